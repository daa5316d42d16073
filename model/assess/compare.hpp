// Model comparison: which rank (and whether to include biases) a rating set
// supports, judged by out-of-sample predictive accuracy.
//
// Each configuration is fitted (fit_bpmf) on the training part of every
// split and scored on the held-out part:
//   mean log predictive density (primary; the unclipped predictive mixture),
//   RMSE of the clipped predictive mean, and the share of held-out ratings
//   inside the central interval at coverage_level (clipped bounds), exactly
//   as model/assess/evaluate.hpp scores them.
// Splits: folds < 2 gives one seeded holdout of holdout_fraction of the
// ratings; folds >= 2 assigns every rating to one of `folds` folds by a
// seeded shuffle (sizes differ by at most one) and holds each out in turn.
// Users or items with no training ratings in a split stay in the id maps and
// are predicted from the population prior.
//
// Figures and standard errors: with K >= 2 folds a figure is the mean of the
// K fold values and its SE is their sd / sqrt(K); with one holdout, the SE is
// across held-out ratings: sd of the per-rating values / sqrt(n) (for RMSE,
// the delta method on the mean squared error: SE(MSE) / (2 RMSE)).
//
// WAIC (Watanabe 2010, "Asymptotic equivalence of Bayes cross validation and
// widely applicable information criterion", JMLR 11) from each split's
// training posterior, per training rating i over kept samples s:
//   lppd_i = log mean_s p(r_i | theta_s),  p_i = sample variance_s log p(r_i | theta_s),
//   elpd_i = lppd_i - p_i;  elpd_waic = sum_i elpd_i,  SE = sqrt(n var_i(elpd_i)),
// reported per training rating (divided by n) so it reads on the same scale
// as the held-out mean log density, and averaged over splits. Ratings with
// p_i > 0.4 make WAIC unreliable (Vehtari, Gelman & Gabry 2017, "Practical
// Bayesian model evaluation using leave-one-out cross-validation and WAIC",
// Statistics and Computing 27); their count is reported and any such rating
// marks the configuration's WAIC unreliable (flagged in the table and the
// JSON; the held-out log density is then the figure to judge by).
//
// Provenance: the result records the settings it was made with and (set by
// the caller that read the ratings) the data fingerprint, so a report can
// refuse a comparison made on other data.
//
// Recommendation (the one-standard-error rule; Hastie, Tibshirani & Friedman,
// "The Elements of Statistical Learning", 2nd ed., section 7.10): the best
// configuration has the highest mean log predictive density; the recommended
// one is the simplest whose mean log density is within one SE of the best,
// where the SE is that of the paired difference to the best (per fold with
// K >= 2, per held-out rating otherwise: both models see the same ratings,
// so the paired SE is the honest yardstick). Simplest = fewest parameters,
// (users + items) x (rank + 1 if biases else rank); ties go to the smaller rank.
#pragma once
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/data/ratings.hpp"
#include "model/fit/sampler.hpp"

namespace credence {

struct CompareOptions {
    std::vector<uint32_t> ranks{2, 4, 8, 16, 32};  // each >= 1, no repeats
    uint32_t folds = 1;                // < 2: one holdout split; >= 2: K-fold
    double holdout_fraction = 0.1;     // for folds < 2; in (0, 1)
    bool both_bias_settings = false;   // fit every rank with biases on and off; else fit.biases only
    double coverage_level = 0.9;       // in (0, 1)
    uint64_t split_seed = 1;           // which ratings are held out
    // Rank and biases are set per configuration. A comparison runs ranks x
    // folds fits, so by default each is a short fixed-length run rather than
    // one that samples until converged (--run-length converged asks for that).
    FitOptions fit = [] {
        FitOptions f;
        f.run_length = RunLength::fixed;
        f.burn_in = 100;
        f.samples = 40;
        return f;
    }();
};

struct ConfigScore {
    uint32_t rank = 0;
    bool biases = false;
    uint64_t parameters = 0;           // (users + items) x (rank + biases)
    double mean_log_predictive_density = 0.0;
    double mean_log_predictive_density_se = 0.0;
    double rmse = 0.0;
    double rmse_se = 0.0;
    double coverage = 0.0;             // at CompareOptions::coverage_level
    double coverage_se = 0.0;
    double difference_to_best = 0.0;   // this mlpd - best mlpd (<= 0)
    double difference_se = 0.0;        // paired SE of that difference; 0 for the best itself
    double waic_elpd_per_rating = 0.0; // elpd_waic / n_train, mean over splits
    double waic_se_per_rating = 0.0;   // SE(elpd_waic) / n_train, mean over splits
    double p_waic = 0.0;               // effective number of parameters, mean over splits
    uint64_t waic_high_variance_ratings = 0;  // ratings with p_i > 0.4, summed over splits
    uint64_t waic_training_ratings = 0;       // training ratings WAIC was computed on, summed over splits
    bool waic_reliable() const { return waic_high_variance_ratings == 0; }
    uint64_t held_out_ratings = 0;     // summed over splits
    double fit_seconds = 0.0;          // summed over splits
};

struct ComparisonResult {
    uint32_t folds = 1;                // splits actually used (1 = holdout)
    double holdout_fraction = 0.0;     // 0 when K-fold
    double coverage_level = 0.0;
    std::vector<ConfigScore> configs;  // in the order fitted: ranks ascending, biases off before on
    size_t best = 0;                   // index into configs
    size_t recommended = 0;
    std::string rule;                  // one sentence stating how `recommended` was chosen
    nlohmann::json settings = nlohmann::json::object();  // ranks, splits, seed and the fit options used
    std::string data_fingerprint;      // of the ratings compared (ingest's); empty when unknown
};

// Needs ratings sorted by (user, item) without duplicate pairs (as ingest
// returns). Throws OptionError for empty or repeated ranks (or a rank of 0),
// a level or holdout fraction outside (0, 1); DataError when there are fewer
// ratings than folds or a split would leave no training or no held-out
// rating; propagates fit_bpmf's errors. All option checks happen before the
// first fit. `log` (may be empty) receives one line per configuration and
// split.
ComparisonResult compare_models(const RatingSet& ratings, const CompareOptions& options,
                                const std::function<void(const std::string&)>& log = {});

// snake_case JSON: folds, holdout_fraction, coverage_level, best,
// recommended (indices), rule, configs [{rank, biases, parameters,
// mean_log_predictive_density, ..._se, rmse, rmse_se, coverage, coverage_se,
// difference_to_best, difference_se, waic {elpd_per_rating, se_per_rating,
// p_waic, high_variance_ratings, training_ratings, reliable},
// held_out_ratings, fit_seconds}], settings, data_fingerprint.
// Non-finite figures are null.
nlohmann::json to_json(const ComparisonResult& result);

// Reads what to_json wrote (for the report). Throws FormatError naming the
// first missing or mistyped key, or a best/recommended index out of range.
// settings, data_fingerprint and waic.training_ratings may be absent (a
// file written before they were recorded): empty / 0.
ComparisonResult comparison_from_json(const nlohmann::json& j);

// A fixed-width text table with one row per configuration, the best and
// recommended rows marked, unreliable WAIC figures starred, and the rule and
// a note on WAIC underneath.
std::string format_table(const ComparisonResult& result);

}  // namespace credence
