// Visitor fold-in: answers for someone the model has not seen, from a few
// (item, rating) pairs given with the request. Used by the server's
// POST /v1/recommendations and by `credence recommend --rated`.
// Model: BPMF (Salakhutdinov & Mnih 2008); the visitor's row has the same
// Gaussian conditional the Gibbs sampler uses for a user's row.
//
// Under each kept sample s the visitor's factor x (and bias b, when the
// model has biases) given their ratings is exactly Gaussian, given that
// sample's item factors V_j, item biases c_j, user hyperparameters
// (mu_U, Lambda_U, lambda_b) and noise precision tau:
//   precision  P_s = blockdiag(Lambda_U, lambda_b) + tau * sum_j y_j y_j'
//   mean       m_s = P_s^-1 (blockdiag(Lambda_U, lambda_b) [mu_U; 0] + tau * sum_j y_j (r_j - g - c_j))
// with y_j = [V_j; 1] (Bishop, Pattern Recognition and Machine Learning,
// 2006, eqs. 3.50-3.51). With no ratings this is the prior.
//
// The visitor is integrated out analytically: a rating of item i under
// sample s is Normal with mean g + c_i + m_s . y_i and variance
// y_i' P_s^-1 y_i + 1/tau, so the predictive is the equal-weight mixture of
// those Normals over the kept samples (model/predict/mixture.hpp). Answers
// are deterministic: no visitor draw enters a mean, sd, interval or a
// ranking by mean, lower or upper. Only RankBy::draw draws: it takes one
// kept sample s* (drawn_sample(draw_seed)) and one visitor draw under it,
// from Rng::keyed(draw_seed, 0, 0, StreamBlock::foldin, s*), so a seed
// reproduces the answer exactly.
#pragma once
#include <cstdint>
#include <span>
#include <vector>

#include "model/posterior/posterior.hpp"
#include "model/predict/predict.hpp"

namespace credence {

struct VisitorRating {
    uint32_t item = 0;  // item index in the posterior
    double rating = 0.0;
};

// The visitor's conditional under every kept sample, owned by value.
struct VisitorPosterior {
    uint32_t dimension = 0;              // D = rank, plus 1 with biases
    std::vector<float> factor_mean;      // [S][K]: m_s's factor part, rounded to float like stored factors
    std::vector<float> bias_mean;        // [S]: m_s's bias part; zeros without biases
    std::vector<double> inverse_factor;  // [S][D][D] row-major: L_s^-1 (lower triangular), P_s = L_s L_s'
};

// One draw of the visitor per kept sample.
struct VisitorFactors {
    std::vector<float> factors;  // [S][K]
    std::vector<float> bias;     // [S]; zeros when the model has no biases
};

// Checks a visitor's ratings against the posterior. Throws DataError naming
// the item (by its id) when an item is rated twice or a rating is not a
// number inside the model's rating scale; std::out_of_range for an item
// index >= num_items (callers map ids to indices first, so that is a bug).
// An empty list is valid (a visitor with no ratings gets the prior).
void check_visitor_ratings(const Posterior& posterior, std::span<const VisitorRating> ratings);

// Needs a validated posterior. Returns the visitor's conditional under every
// kept sample. Throws what check_visitor_ratings() throws, and NumericError
// if a conditional precision is not positive definite (a corrupt model).
VisitorPosterior fold_in(const Posterior& posterior, std::span<const VisitorRating> ratings);

// One draw x_s ~ Normal(m_s, P_s^-1) per kept sample s, from
// Rng::keyed(seed, 0, 0, StreamBlock::foldin, s). Throws like fold_in().
VisitorFactors fold_in_visitor(const Posterior& posterior, std::span<const VisitorRating> ratings, uint64_t seed);

// The predictive of `item` for the visitor, per kept sample: means[s] =
// g + c_i,s + m_s . y_i,s and precisions[s] = 1 / (y_i,s' P_s^-1 y_i,s + 1/tau_s)
// (both resized to S). Needs `visitor` from fold_in() on the same posterior
// and item < num_items (unchecked).
void visitor_components(const Posterior& posterior, const VisitorPosterior& visitor, uint32_t item,
                        std::vector<double>& means, std::vector<double>& precisions);

// The visitor's Prediction for one item: mixture mean and sd, and the exact
// mixture quantiles at (1 -+ level) / 2, mean and bounds clipped to the
// scale, as PredictionEngine::predict() does for a known user. Throws
// OptionError for a level outside (0, 1); std::out_of_range for an item
// index beyond the model.
Prediction predict_for_visitor(const Posterior& posterior, const VisitorPosterior& visitor, uint32_t item,
                               double level);

// Top-N for a visitor: fold_in(), then items ranked by the exact predictive
// mixture (mean, lower or upper bound), or for RankBy::draw by one kept
// sample and one visitor draw under it (see above; options.draw_seed keys
// both). Rated items are excluded when options.exclude_rated. Every
// Recommendation carries predict_for_visitor() at options.level; its score is
// unclipped, as for known users. Ranking by a bound is exact: each item's
// bound lies between its smallest and largest per-sample quantile, which
// prunes the catalogue, and exact mixture quantiles decide the rest
// (model/predict/top_n.hpp). Throws what fold_in() and
// PredictionEngine::recommend_for_factors() throw.
std::vector<Recommendation> recommend_for_visitor(const PredictionEngine& engine,
                                                  std::span<const VisitorRating> ratings,
                                                  const RecommendOptions& options);

}  // namespace credence
