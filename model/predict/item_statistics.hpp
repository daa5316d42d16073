// Per-item statistics of one posterior, computed once when a model is loaded,
// and the similar-items ranking built on them. Used by the server (item
// routes, population answers) and by anything else that summarises items.
// The model is BPMF (Salakhutdinov & Mnih 2008): a statistic "over samples"
// is an equal-weight average over the posterior's kept Gibbs samples.
#pragma once
#include <cstdint>
#include <span>
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
    // [I] sd of m_s(u, i) over the same (user, sample) pairs: how much
    // customers differ, mixed with posterior uncertainty (population answers).
    std::vector<double> population_sd;
    // The predictive answer for one known customer u and item i is the
    // mixture over samples of Normal(m_s(u, i), 1/tau_s), as PredictionEngine
    // summarises it: its mean clipped to the rating scale, and its sd
    // sqrt(mean_s 1/tau_s + mean_s m_s^2 - (mean_s m_s)^2) (unclipped).
    // [I] that clipped predictive mean averaged over the U known customers
    // (equal weight per customer, rated the item or not).
    std::vector<double> predictive_mean;
    // [I] that predictive sd averaged over the U known customers (the plain
    // mean of the U sds, not the root mean square). With no known customers
    // both are instead the mixture of the unseen-customer Normals of
    // model/predict/population.hpp (mean clipped, sd of the mixture).
    std::vector<double> predictive_sd;
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
    std::vector<uint32_t> by_uncertainty;  // predictive_sd
    std::vector<uint32_t> by_popularity;   // rating_count
    std::vector<uint32_t> by_mean;         // predictive_mean

    // Sigma_U,s and Sigma_V,s for every sample: population_mean needs them
    // when no user is known, and population answers (population.hpp) reuse them.
    HyperparameterCovariances covariances;
};

// Needs a posterior that passed Posterior::validate(). Returns every
// statistic above, owning its arrays (nothing refers back to the posterior).
// Cost: the predictive figures visit every (customer, item, sample) triple,
// U * I * S * K float multiply-adds, with a transposed copy of the item
// factors while it runs.
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

// The n items of `among` most similar to `target` by the same averaged
// cosine as similar_items() (computed in double here), most similar first,
// ties by item index; `target` itself is skipped if listed, and so are
// repeats. Used to explain a recommendation by the customer's own rated
// products. Needs `statistics` from this posterior (std::invalid_argument
// otherwise); throws std::out_of_range when target or an item of `among` is
// not below I. Returns min(n, distinct items of among other than target).
std::vector<SimilarItem> most_similar_among(const Posterior& posterior, const ItemStatistics& statistics,
                                            uint32_t target, std::span<const uint32_t> among, uint32_t n);

// most_similar_among() for several targets at once: entry t is
// most_similar_among(posterior, statistics, targets[t], among, n), bit for
// bit, and throws the same. One pass over the samples serves every target,
// so explaining a list of n recommendations reads the rated products'
// factors from memory once rather than n times.
std::vector<std::vector<SimilarItem>> most_similar_among_each(const Posterior& posterior,
                                                              const ItemStatistics& statistics,
                                                              std::span<const uint32_t> targets,
                                                              std::span<const uint32_t> among, uint32_t n);

}  // namespace credence
