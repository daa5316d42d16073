#include "model/predict/foldin.hpp"

#include <algorithm>
#include <stdexcept>
#include <string>

#include <Eigen/Dense>
#include <fmt/format.h>

#include "model/error.hpp"
#include "model/math/random.hpp"

namespace credence {

namespace {

// The visitor's Gaussian conditional under sample s in information form:
// `precision` (lower triangle filled, then symmetrised) and h = precision * mean.
void visitor_conditional(const Posterior& p, std::span<const VisitorRating> ratings, uint32_t s,
                         Eigen::MatrixXd& precision, Eigen::VectorXd& h, Eigen::VectorXd& y) {
    const uint32_t K = p.rank;
    precision.setZero();
    h.setZero();
    for (uint32_t a = 0; a < K; ++a)
        for (uint32_t b = 0; b < K; ++b)
            precision(a, b) = p.user_lambda[(static_cast<size_t>(s) * K + a) * K + b];
    Eigen::Map<const Eigen::VectorXf> mu(p.user_mu.data() + static_cast<size_t>(s) * K, K);
    h.head(K) = precision.topLeftCorner(K, K) * mu.cast<double>();
    if (p.has_biases) precision(K, K) = p.user_bias_precision[s];  // bias prior mean is 0

    const double tau = p.noise_precision[s];
    for (const auto& r : ratings) {
        const auto v = p.item_factor(s, r.item);
        for (uint32_t k = 0; k < K; ++k) y(k) = v[k];
        if (p.has_biases) y(K) = 1.0;
        const double residual = r.rating - p.global_mean - p.item_bias_of(s, r.item);
        precision.selfadjointView<Eigen::Lower>().rankUpdate(y, tau);
        h += (tau * residual) * y;
    }
    precision = precision.selfadjointView<Eigen::Lower>();
}

}  // namespace

void check_visitor_ratings(const Posterior& p, std::span<const VisitorRating> ratings) {
    std::vector<uint32_t> items;
    items.reserve(ratings.size());
    for (const auto& r : ratings) {
        if (r.item >= p.num_items)
            throw std::out_of_range("fold-in: item index " + std::to_string(r.item) + " is not below " +
                                    std::to_string(p.num_items));
        const std::string& id = p.item_ids[r.item];
        if (!(r.rating >= p.scale.min && r.rating <= p.scale.max))
            throw DataError(fmt::format("rating {} for item '{}' is outside the scale [{}, {}]", r.rating, id,
                                        p.scale.min, p.scale.max));
        items.push_back(r.item);
    }
    std::sort(items.begin(), items.end());
    if (const auto twice = std::adjacent_find(items.begin(), items.end()); twice != items.end())
        throw DataError(fmt::format("item '{}' is rated twice; give each item once", p.item_ids[*twice]));
}

VisitorFactors fold_in_visitor(const Posterior& p, std::span<const VisitorRating> ratings, uint64_t seed) {
    check_visitor_ratings(p, ratings);
    const uint32_t S = p.num_samples, K = p.rank;
    const int D = static_cast<int>(K) + (p.has_biases ? 1 : 0);
    VisitorFactors out;
    out.factors.resize(static_cast<size_t>(S) * K);
    out.bias.assign(S, 0.0f);
    Eigen::MatrixXd precision(D, D);
    Eigen::VectorXd h(D), y(D), z(D);
    for (uint32_t s = 0; s < S; ++s) {
        visitor_conditional(p, ratings, s, precision, h, y);
        Eigen::LLT<Eigen::MatrixXd> llt(precision);
        if (llt.info() != Eigen::Success)
            throw NumericError("fold-in: the visitor's conditional precision under sample " + std::to_string(s) +
                               " is not positive definite; the model file may be corrupt");
        // One draw from Normal(P^-1 h, P^-1): x = P^-1 h + L^-T z has
        // covariance (L L')^-1 = P^-1.
        Rng rng = Rng::keyed(seed, 0, 0, StreamBlock::foldin, s);
        for (int d = 0; d < D; ++d) z(d) = rng.normal();
        const Eigen::VectorXd x = llt.solve(h) + llt.matrixU().solve(z);
        for (uint32_t k = 0; k < K; ++k) out.factors[static_cast<size_t>(s) * K + k] = static_cast<float>(x(k));
        if (p.has_biases) out.bias[s] = static_cast<float>(x(K));
    }
    return out;
}

std::vector<Recommendation> recommend_for_visitor(const PredictionEngine& engine,
                                                  std::span<const VisitorRating> ratings, uint64_t seed,
                                                  const RecommendOptions& options) {
    const VisitorFactors visitor = fold_in_visitor(engine.posterior(), ratings, seed);
    std::vector<uint32_t> rated;
    rated.reserve(ratings.size());
    for (const auto& r : ratings) rated.push_back(r.item);
    std::sort(rated.begin(), rated.end());  // unique: fold_in_visitor checked
    return engine.recommend_for_factors(visitor.factors, visitor.bias, rated, options);
}

}  // namespace credence
