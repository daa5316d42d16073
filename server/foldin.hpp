// Visitor fold-in: recommendations for someone the model has not seen, from a
// few (item, rating) pairs given with the request.
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

namespace credence::server {

struct VisitorRating {
    uint32_t item = 0;  // valid item index
    double rating = 0.0;
};

struct VisitorFactors {
    std::vector<float> factors;  // [S][K]
    std::vector<float> bias;     // [S]; zeros when the model has no biases
};

// Needs valid item indices (each at most once). Throws credence::NumericError
// if a conditional precision is not positive definite (a corrupt model).
VisitorFactors fold_in_visitor(const Posterior& posterior, std::span<const VisitorRating> ratings, uint64_t seed);

}  // namespace credence::server
