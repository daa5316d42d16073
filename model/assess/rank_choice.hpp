// Choosing a fit's rank from its own ratings: what `credence fit` does unless
// given --rank K (cli/fit_command.cpp). It is compare_models (compare.hpp) on
// a seeded holdout of the training ratings with short fixed-length fits, and
// compare's one-standard-error recommendation. README.md ("The rank") gives
// the reasons and the measurements.
#pragma once
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/assess/compare.hpp"
#include "model/data/ratings.hpp"
#include "model/fit/sampler.hpp"

namespace credence {

struct RankChoiceOptions {
    // Each >= 1, no repeats. The largest is the rank the fit used by default
    // before the rank was chosen, so the choice never costs more per sweep.
    std::vector<uint32_t> candidates{2, 4, 8, 16};
    double holdout_fraction = 0.1;       // of the training ratings; in (0, 1)
    // Fewer held-out ratings than this cannot tell ranks apart (the paired SE
    // of a difference in mean log density is then about 0.1 or more, common
    // practice): the choice is refused rather than made on noise.
    uint64_t min_held_out_ratings = 50;
};

struct RankChoice {
    uint32_t rank = 0;                   // the comparison's recommended rank
    ComparisonResult comparison;         // every candidate's figures, settings
};

// Needs the ratings the fit will be trained on, sorted by (user, item) without
// duplicate pairs (as ingest returns them), and the fit's own options: their
// biases, priors, noise setting, chains, threads and seed are used for every
// candidate (split seed = fit.seed); the run length is always compare's short
// fixed default (CompareOptions{}.fit), whatever fit.run_length says.
// Returns the rank compare_models recommends. Throws OptionError for an empty
// or repeated candidate list (or a rank of 0) or a fraction outside (0, 1);
// DataError when the holdout would hold fewer than min_held_out_ratings
// ratings (the message says how many there are and to give a rank instead);
// propagates fit_bpmf's errors. `log` (may be empty) receives one line per
// candidate.
RankChoice choose_rank(const RatingSet& train, const FitOptions& fit, const RankChoiceOptions& options,
                       const std::function<void(const std::string&)>& log = {});

// What the fit records about the choice (fit metadata "rank_choice"):
// {rank, candidates, rule, held_out_ratings, holdout_fraction, seconds,
//  scores [{rank, mean_log_predictive_density, difference_to_best,
//  difference_se}]}. Non-finite figures are null.
nlohmann::json to_json(const RankChoice& choice);

// One line for a person: "rank 4, chosen from 2, 4, 8, 16: ..." with the
// chosen and best candidates' held-out figures.
std::string describe(const RankChoice& choice);

}  // namespace credence
