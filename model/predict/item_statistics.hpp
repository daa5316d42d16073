// Per-item statistics of one posterior, computed once when a model is loaded,
// and the similar-items ranking built on them. Used by the server (item
// routes, population answers) and by anything else that summarises items.
// The model is BPMF (Salakhutdinov & Mnih 2008): a statistic "over samples"
// is an equal-weight average over the posterior's kept Gibbs samples.
#pragma once
#include <cstdint>
#include <vector>

#include "model/posterior/posterior.hpp"

namespace credence {

// The inverse of each kept sample's hyperparameter precision matrices:
// Sigma_U,s = Lambda_U,s^-1 and Sigma_V,s = Lambda_V,s^-1, the covariance of
// an unseen user's (item's) factor under sample s. Row-major, in double.
struct HyperparameterCovariances {
    uint32_t rank = 0;         // K
    uint32_t num_samples = 0;  // S
    std::vector<double> user;  // [S][K][K]
    std::vector<double> item;  // [S][K][K]

    // Sample s's K x K matrix, row-major. No bounds check: s < num_samples.
    const double* user_of(uint32_t s) const { return user.data() + static_cast<size_t>(s) * rank * rank; }
    const double* item_of(uint32_t s) const { return item.data() + static_cast<size_t>(s) * rank * rank; }
};

// Needs a posterior that passed Posterior::validate(). Returns the inverses
// (through a Cholesky factorisation). Throws NumericError naming the side and
// the sample when a precision matrix is not positive definite (a corrupt or
// hand-edited file: the model cannot answer for unseen users or items).
HyperparameterCovariances hyperparameter_covariances(const Posterior& posterior);

// Write m_s(u, i) = g + b_u,s + c_i,s + U_u,s . V_i,s for sample s's noise-free
// prediction. Every "over samples" below averages over the S kept samples
// with equal weight; an sd is the population sd (divide by the count, not
// count - 1) of the same values.
struct ItemStatistics {
    uint32_t num_items = 0;    // I
    uint32_t rank = 0;         // K
    uint32_t num_samples = 0;  // S

    // [I] training ratings of each item (from the posterior's rated lists).
    std::vector<uint32_t> rating_count;
    // [I] mean of m_s(u, i) over every (known user u, sample s) pair. With no
    // known users, u is instead an unseen user drawn from sample s's
    // hyperparameter prior (factor Normal(mu_U,s, Sigma_U,s), bias
    // Normal(0, 1/lambda_b,s)), and the moments are exact expectations.
    std::vector<double> population_mean;
    // [I] sd of m_s(u, i) over the same (user, sample) pairs.
    std::vector<double> population_sd;
    // [I][K] mean over samples of each coordinate of the item's factor V_i,s.
    std::vector<float> factor_mean;
    // [I][K] sd over samples of each coordinate of V_i,s.
    std::vector<float> factor_sd;
    // [I] root mean square over k of factor_sd[i][k]: one number for how
    // uncertain the item's factor is.
    std::vector<double> factor_spread;
    // [S][I] Euclidean norm |V_i,s| of each sample's item factor.
    std::vector<float> item_norm;

    // Item indices ordered by a statistic, largest first; ties by item index.
    std::vector<uint32_t> by_uncertainty;  // factor_spread
    std::vector<uint32_t> by_popularity;   // rating_count
    std::vector<uint32_t> by_mean;         // population_mean

    // Sigma_U,s and Sigma_V,s for every sample: population_mean needs them
    // when no user is known, and population answers (population.hpp) reuse them.
    HyperparameterCovariances covariances;
};

// Needs a posterior that passed Posterior::validate(). Returns every
// statistic above, owning its arrays (nothing refers back to the posterior).
// Throws NumericError as hyperparameter_covariances() does.
ItemStatistics compute_item_statistics(const Posterior& posterior);

struct SimilarItem {
    uint32_t item = 0;
    double similarity = 0.0;  // mean over samples of the cosine; in [-1, 1]
    bool operator==(const SimilarItem&) const = default;
};

// The n items most similar to `target`, most similar first, never `target`
// itself. Similarity of items i and j is the cosine of V_i,s and V_j,s
// computed within each sample s, averaged over the S samples. (Averaging
// the factors first would be wrong: factors are identified only up to a
// rotation, which differs between chains.) A zero factor has no direction
// and counts as cosine 0 in that sample. Ties break by item index.
// Needs `statistics` computed from this posterior and target < num_items
// (std::out_of_range otherwise; std::invalid_argument when the statistics
// have another shape). Returns min(n, I - 1) items; n == 0 gives none.
std::vector<SimilarItem> similar_items(const Posterior& posterior, const ItemStatistics& statistics,
                                       uint32_t target, uint32_t n);

}  // namespace credence
