#include "model/predict/population.hpp"

#include <algorithm>
#include <stdexcept>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include "model/predict/mixture.hpp"

namespace credence {

namespace {

using MatrixXdR = Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

void check_arguments(const Posterior& p, const HyperparameterCovariances& cov, std::optional<uint32_t> user,
                     std::optional<uint32_t> item, double level) {
    const size_t matrices = static_cast<size_t>(p.num_samples) * p.rank * p.rank;
    if (cov.rank != p.rank || cov.num_samples != p.num_samples || cov.user.size() != matrices ||
        cov.item.size() != matrices)
        throw std::invalid_argument("population_prediction: the covariances were computed from another posterior");
    if (!(level > 0.0 && level < 1.0))
        throw std::invalid_argument("population_prediction: level must lie in (0, 1), got " + std::to_string(level));
    if (user && *user >= p.num_users)
        throw std::out_of_range("population_prediction: user index " + std::to_string(*user) + " is not below " +
                                std::to_string(p.num_users));
    if (item && *item >= p.num_items)
        throw std::out_of_range("population_prediction: item index " + std::to_string(*item) + " is not below " +
                                std::to_string(p.num_items));
}

}  // namespace

Prediction population_prediction(const Posterior& p, const HyperparameterCovariances& covariances,
                                 std::optional<uint32_t> user, std::optional<uint32_t> item, double level) {
    check_arguments(p, covariances, user, item, level);
    const uint32_t S = p.num_samples, K = p.rank;
    std::vector<double> means(S);
    std::vector<float> precisions(S);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const MatrixXdR> cov_u(covariances.user_of(s), K, K);
        Eigen::Map<const MatrixXdR> cov_v(covariances.item_of(s), K, K);
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
    // The mean and bounds are clipped to the rating scale, as PredictionEngine
    // does (model/predict/predict.hpp); the sd is the unclipped spread.
    const double lo = p.scale.min, hi = p.scale.max;
    Prediction out;
    out.mean = std::clamp(mixture_mean(means), lo, hi);
    out.sd = mixture_sd(means, precisions);
    out.lower = std::clamp(mixture_quantile(means, precisions, (1.0 - level) / 2.0), lo, hi);
    out.upper = std::clamp(mixture_quantile(means, precisions, (1.0 + level) / 2.0), lo, hi);
    return out;
}

}  // namespace credence
