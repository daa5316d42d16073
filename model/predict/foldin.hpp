// Visitor fold-in: answers for someone the model has not seen, from a few
// (item, rating) pairs given with the request. Used by the server's
// POST /v1/recommendations and by `credence recommend --rated`.
// Model: BPMF (Salakhutdinov & Mnih 2008); the visitor's row is drawn from
// the same Gaussian conditional the Gibbs sampler uses for a user's row.
//
// For each kept sample s the visitor's factor x (and bias b, when the model
// has biases) is drawn from its exact Gaussian conditional given that
// sample's item factors V_j, item biases c_j, user hyperparameters
// (mu_U, Lambda_U, lambda_b) and noise precision tau:
//   precision  P = blockdiag(Lambda_U, lambda_b) + tau * sum_j y_j y_j'
//   mean       P^-1 (blockdiag(Lambda_U, lambda_b) [mu_U; 0] + tau * sum_j y_j (r_j - g - c_j))
// with y_j = [V_j; 1]. With no ratings this is the prior. Randomness comes
// from Rng::keyed(seed, 0, 0, StreamBlock::foldin, s), so a seed reproduces
// the answer exactly.
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

// Needs a validated posterior. Returns one draw of the visitor's factor and
// bias per kept sample, owned by the result. Throws what
// check_visitor_ratings() throws, and NumericError if a conditional
// precision is not positive definite (a corrupt model).
VisitorFactors fold_in_visitor(const Posterior& posterior, std::span<const VisitorRating> ratings, uint64_t seed);

// Top-N for a visitor: fold_in_visitor(engine's posterior, ratings, seed),
// then PredictionEngine::recommend_for_factors() with the rated items
// excluded (when options.exclude_rated). `seed` keys only the fold-in draws;
// options.draw_seed keys RankBy::draw as usual (the server and the CLI pass
// the same number for both). Throws what fold_in_visitor() and
// recommend_for_factors() throw.
std::vector<Recommendation> recommend_for_visitor(const PredictionEngine& engine,
                                                  std::span<const VisitorRating> ratings, uint64_t seed,
                                                  const RecommendOptions& options);

}  // namespace credence
