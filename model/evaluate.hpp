// Offline evaluation of a fitted model on held-out ratings: point accuracy
// (RMSE, MAE), probabilistic accuracy (mean log predictive density, PIT) and
// calibration (empirical coverage of central credible intervals).
#pragma once
#include <cstdint>
#include <map>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/predict.hpp"
#include "model/ratings.hpp"

namespace credence {

struct EvaluationOptions {
    std::vector<double> coverage_levels{0.5, 0.8, 0.9, 0.95};  // each in (0, 1)
};

struct EvaluationReport {
    // Over the rated pairs. rmse and mae use the predictive mean clipped to
    // the scale (what a client is shown); the log density is of the unclipped
    // mixture (clipping would put point masses at the scale ends). All three
    // are NaN when no pair could be rated.
    double rmse = 0.0;
    double mae = 0.0;
    double mean_log_predictive_density = 0.0;
    // Level as shortest decimal ("0.9") -> share of ratings inside the central
    // interval at that level (clipped bounds; a rating on a bound is inside).
    std::map<std::string, double> coverage;
    // Every test pair lands in exactly one count: rated + unknown_users +
    // unknown_items == test.size(). A pair whose user is unknown counts as an
    // unknown user whatever its item; unknown_items counts pairs with a known
    // user and an unknown item.
    uint64_t rated = 0;
    uint64_t unknown_users = 0;
    uint64_t unknown_items = 0;
    // Probability integral transform F(r) of each rated pair under its
    // unclipped predictive mixture, in test-set order; uniform on (0, 1) when
    // the model is calibrated.
    std::vector<double> pit;
};

// Needs: test ids are external strings, mapped by name to the posterior's
// users and items. Parallel over pairs (OpenMP); the result does not depend
// on the thread count. Throws std::invalid_argument for a coverage level
// outside (0, 1).
EvaluationReport evaluate(const PredictionEngine& engine, const RatingSet& test, const EvaluationOptions& options);

// Keys: rmse, mae, mean_log_predictive_density, coverage {"0.5": ...},
// rated, unknown_users, unknown_items (NaN metrics become null).
nlohmann::json to_json(const EvaluationReport& report);

}  // namespace credence
