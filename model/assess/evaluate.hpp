// Offline evaluation of a fitted model on held-out ratings: point accuracy
// (RMSE, MAE), probabilistic accuracy (mean log predictive density, PIT),
// calibration (empirical coverage of central credible intervals, PIT
// histogram, coverage curve; model/assess/calibration.hpp) and top-k ranking quality
// for each rank_by mode (model/assess/ranking_metrics.hpp).
//
// Ranking protocol: every held-out user known to the model with at least one
// held-out rating on a known item gets a top-k list from
// PredictionEngine::recommend over all items, with the items rated in
// training excluded (the posterior's rated-items lists). A held-out item
// counts as relevant when its rating is >= relevance_threshold, an absolute
// value in rating units (default 4.0: "liked" on a 1..5 scale; pick a value
// that means the same on other scales). Gains are graded (the rating).
//
// Honesty: the report counts scored pairs the model was trained on (the
// posterior's rated-items lists) and warns about them, about a file most
// of whose ratings cannot be scored and about ratings outside the model's
// scale; and it scores the product-mean baseline
// (model/data/product_means.hpp, stored by the fit) on the same pairs.
#pragma once
#include <cstdint>
#include <map>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/assess/calibration.hpp"
#include "model/predict/predict.hpp"
#include "model/assess/ranking_metrics.hpp"
#include "model/data/ratings.hpp"

namespace credence {

struct EvaluationOptions {
    std::vector<double> coverage_levels{0.5, 0.8, 0.9, 0.95};  // each in (0, 1)
    // Levels of the coverage curve (computed from PIT): 0.10, 0.15, ..., 0.95.
    std::vector<double> curve_levels = default_curve_levels();
    uint32_t pit_bins = 10;                // >= 1
    bool ranking = true;                   // compute the top-k metrics
    uint32_t ranking_k = 10;               // >= 1
    double relevance_threshold = 4.0;      // finite, rating units
    double ranking_level = 0.9;            // interval level for rank_by lower / upper, in (0, 1)
    uint64_t draw_seed = 1;                // rank_by draw: each user's sample comes from (seed, user)

    static std::vector<double> default_curve_levels();
};

// Top-k metrics of one rank_by mode ("mean", "lower", "upper", "draw").
struct RankingByMode {
    std::string rank_by;
    RankingMetrics metrics;
};

// The product-mean baseline scored on the model's pairs: the prediction
// Normal(product mean, residual sd^2), mean clipped to the scale as the
// model's is, intervals central and clipped.
struct BaselineFigures {
    bool available = false;  // false when the posterior stores no baseline (fitted by an older version)
    double rmse = 0.0, mae = 0.0, mean_log_predictive_density = 0.0;
    std::map<std::string, double> coverage;  // as EvaluationReport::coverage
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
    uint64_t in_training = 0;          // rated pairs that are among the model's training pairs
    std::vector<std::string> warnings; // pairs in training; most ratings not scorable; ratings off the scale
    BaselineFigures baseline;
    // Probability integral transform F(r) of each rated pair under its
    // unclipped predictive mixture, in test-set order; uniform on (0, 1) when
    // the model is calibrated.
    std::vector<double> pit;
    // Empty / zero-total when no pair was rated.
    PitHistogram pit_histogram;
    std::vector<CoveragePoint> coverage_curve;
    // One entry per rank_by mode, in the order mean, lower, upper, draw;
    // empty when options.ranking is false or no user could be ranked.
    std::vector<RankingByMode> ranking;
    uint32_t ranking_k = 0;              // as used; 0 when ranking was not computed
    double relevance_threshold = 0.0;
};

// Needs: test ids are external strings, mapped by name to the posterior's
// users and items. Parallel over pairs (OpenMP); the result does not depend
// on the thread count. Throws OptionError for a coverage or curve level
// outside (0, 1), pit_bins or ranking_k of 0, a relevance threshold that is
// not finite or (with ranking) not within the model's scale (min, max], or a
// ranking level outside (0, 1), before any work.
EvaluationReport evaluate(const PredictionEngine& engine, const RatingSet& test, const EvaluationOptions& options);

// Refuses a report that scored nothing (every pair had a customer or product
// the model does not know): throws DataError naming `ratings_name`,
// `model_name` and the two counts, and saying to check the file belongs to
// the model. Returns normally when at least one pair was scored. Used by
// every command that scores a file (evaluate, report --validation).
void require_scored(const EvaluationReport& report, const std::string& model_name, const std::string& ratings_name);

// Keys: rmse, mae, mean_log_predictive_density, coverage {"0.5": ...},
// rated, unknown_users, unknown_items, in_training, warnings, baseline
// {available, rmse, mae, mean_log_predictive_density, coverage} (NaN metrics become null);
// pit_histogram {counts, total, chi_square, degrees_of_freedom};
// coverage_curve [{level, inside, total, coverage, standard_error}];
// ranking {k, relevance_threshold, gain, modes: {"mean": {precision_at_k,
// recall_at_k, ndcg_at_k, catalogue_coverage, users_evaluated,
// users_without_relevant, distinct_items_recommended}, ...}} (absent when
// ranking was not computed).
nlohmann::json to_json(const EvaluationReport& report);

}  // namespace credence
