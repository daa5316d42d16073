#include "server/foldin.hpp"

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/math/random.hpp"

namespace credence::server {

VisitorFactors fold_in_visitor(const Posterior& p, std::span<const VisitorRating> ratings, uint64_t seed) {
    const uint32_t S = p.num_samples, K = p.rank;
    const int D = static_cast<int>(K) + (p.has_biases ? 1 : 0);
    VisitorFactors out;
    out.factors.resize(static_cast<size_t>(S) * K);
    out.bias.assign(S, 0.0f);
    Eigen::MatrixXd precision(D, D);
    Eigen::VectorXd h(D), y(D), z(D);
    for (uint32_t s = 0; s < S; ++s) {
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
        Eigen::LLT<Eigen::MatrixXd> llt(precision);
        if (llt.info() != Eigen::Success)
            throw NumericError("fold-in: the visitor's conditional precision under sample " + std::to_string(s) +
                               " is not positive definite; the model file may be corrupt");
        Rng rng = Rng::keyed(seed, 0, 0, StreamBlock::foldin, s);
        for (int d = 0; d < D; ++d) z(d) = rng.normal();
        // x = P^-1 h + L^-T z has covariance (L L')^-1 = P^-1.
        const Eigen::VectorXd x = llt.solve(h) + llt.matrixU().solve(z);
        for (uint32_t k = 0; k < K; ++k) out.factors[static_cast<size_t>(s) * K + k] = static_cast<float>(x(k));
        if (p.has_biases) out.bias[s] = static_cast<float>(x(K));
    }
    return out;
}

}  // namespace credence::server
