#include "server/population.hpp"

#include <algorithm>
#include <vector>

#include <Eigen/Dense>

namespace credence::server {

namespace {
using MatrixXdR = Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
}

Prediction population_prediction(const LoadedModel& model, std::optional<uint32_t> user,
                                 std::optional<uint32_t> item, double level) {
    const Posterior& p = *model.posterior;
    const uint32_t S = p.num_samples, K = p.rank;
    std::vector<double> means(S);
    std::vector<float> precisions(S);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const MatrixXdR> cov_u(model.user_cov.data() + static_cast<size_t>(s) * K * K, K, K);
        Eigen::Map<const MatrixXdR> cov_v(model.item_cov.data() + static_cast<size_t>(s) * K * K, K, K);
        const Eigen::VectorXd mu_u =
            Eigen::Map<const Eigen::VectorXf>(p.user_mu.data() + static_cast<size_t>(s) * K, K).cast<double>();
        const Eigen::VectorXd mu_v =
            Eigen::Map<const Eigen::VectorXf>(p.item_mu.data() + static_cast<size_t>(s) * K, K).cast<double>();
        double mean = p.global_mean;
        double var = 1.0 / p.noise_precision[s];
        if (user && item) {  // not a population case, but answer it consistently
            mean = p.sample_prediction(s, *user, *item);
        } else if (user) {
            const Eigen::VectorXd u =
                Eigen::Map<const Eigen::VectorXf>(p.user_factor(s, *user).data(), K).cast<double>();
            mean += p.user_bias_of(s, *user) + mu_v.dot(u);
            var += u.dot(cov_v * u) + (p.has_biases ? 1.0 / p.item_bias_precision[s] : 0.0);
        } else if (item) {
            const Eigen::VectorXd v =
                Eigen::Map<const Eigen::VectorXf>(p.item_factor(s, *item).data(), K).cast<double>();
            mean += p.item_bias_of(s, *item) + mu_u.dot(v);
            var += v.dot(cov_u * v) + (p.has_biases ? 1.0 / p.user_bias_precision[s] : 0.0);
        } else {
            // Var(u.v) for independent u ~ N(mu_u, Cu), v ~ N(mu_v, Cv):
            // mu_u' Cv mu_u + mu_v' Cu mu_v + tr(Cu Cv).
            mean += mu_u.dot(mu_v);
            var += mu_u.dot(cov_v * mu_u) + mu_v.dot(cov_u * mu_v) + (cov_u.cwiseProduct(cov_v.transpose())).sum();
            if (p.has_biases) var += 1.0 / p.user_bias_precision[s] + 1.0 / p.item_bias_precision[s];
        }
        means[s] = mean;
        precisions[s] = static_cast<float>(1.0 / var);
    }
    const double lo = p.scale.min, hi = p.scale.max;
    Prediction out;
    out.mean = std::clamp(mixture_mean(means), lo, hi);
    out.sd = mixture_sd(means, precisions);
    out.lower = std::clamp(mixture_quantile(means, precisions, (1.0 - level) / 2.0), lo, hi);
    out.upper = std::clamp(mixture_quantile(means, precisions, (1.0 + level) / 2.0), lo, hi);
    return out;
}

}  // namespace credence::server
