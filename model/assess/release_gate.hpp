// The check before a new model replaces the live one: both models scored on
// the same held-out ratings, pair by pair, and the rule that refuses the new
// one. Used by `credence fit --gate` (cli/fit_command.cpp) and, for the
// accuracy part, by `credence delta --validation` (model/assess/model_delta.hpp).
//
// Paired comparison: a rating counts only when both models know its
// customer and product and neither was trained on the pair (the posterior's
// rated-items lists say which pairs a model saw; scoring a model on its own
// training pairs flatters it). Per rating the difference of log predictive
// densities d = log p_new(r) - log p_live(r) (each the model's predictive
// mixture, as evaluate scores it); the figure is mean(d) and its standard
// error sd(d) / sqrt(n): both models see the same ratings, so the paired SE
// is the honest yardstick (as in model/assess/compare.hpp).
//
// Rule: refuse when the new model did not converge (its verdict, and that of
// the fit that was checked when they differ), or when mean(d) < -2 SE: worse
// by more than two standard errors of the paired difference. With no rating
// to compare on (no live model, or none of the held-out ratings qualify) the
// accuracy part cannot refuse; the decision says so.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/data/ratings.hpp"
#include "model/posterior/posterior.hpp"

namespace credence {

struct PairedAccuracy {
    uint64_t ratings = 0;           // in the test set
    uint64_t compared = 0;          // scored by both models, trained on by neither
    uint64_t unknown = 0;           // a model does not know the customer or the product
    uint64_t trained = 0;           // a model was trained on the pair
    // Over the compared ratings (NaN when none):
    double before_log_density = 0.0, after_log_density = 0.0;  // mean log predictive density
    double before_rmse = 0.0, after_rmse = 0.0;                // of the clipped predictive means
    double log_density_difference = 0.0;     // after - before, mean per rating
    double log_density_difference_se = 0.0;  // paired SE of that mean (NaN below 2 ratings)
    double squared_error_difference = 0.0;   // after - before, mean squared error per rating
    double squared_error_difference_se = 0.0;
};

// Scores `before` and `after` on `test` (external ids, mapped by name onto
// each model). Parallel over ratings; the figures do not depend on the
// thread count. Needs posteriors that pass Posterior::validate().
PairedAccuracy paired_accuracy(const Posterior& before, const Posterior& after, const RatingSet& test);

nlohmann::json to_json(const PairedAccuracy& accuracy);  // snake_case; NaN figures as null

struct GateDecision {
    bool pass = true;
    std::vector<std::string> reasons;  // why it refused (empty when it passed)
    std::vector<std::string> notes;    // what it could not check
    nlohmann::json record;             // stored in the fit metadata under "gate"
};

inline constexpr double kGateStandardErrors = 2.0;

// `accuracy`: the new model against the live one, null when there is no
// live model. `verdicts`: the convergence verdicts of every fit behind the
// new model (the checked fit, and the refit on all ratings when there is one).
GateDecision judge_release(const PairedAccuracy* accuracy, const std::vector<std::string>& verdicts);

}  // namespace credence
