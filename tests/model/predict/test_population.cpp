// Tests for model/predict/population: answers for unseen users and items
// have the exact per-sample predictive mean and variance, checked against a
// brute-force Monte Carlo of the integral over the unseen factors, and the
// function refuses arguments that break its contract.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <memory>
#include <optional>
#include <stdexcept>
#include <vector>

#include <Eigen/Dense>

#include "model/math/random.hpp"
#include "model/predict/item_statistics.hpp"
#include "model/predict/population.hpp"
#include "model/predict/predict.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

// A one-sample, rank-1 model with chosen numbers.
Posterior tiny() {
    Posterior p = simulate_posterior({.users = 3, .items = 4, .rank = 1, .samples = 1, .chains = 1});
    p.global_mean = 3.0f;
    p.item_factors = {0.8f, -0.5f, 1.2f, 0.1f};
    p.item_bias = {0.2f, -0.1f, 0.0f, 0.3f};
    p.user_bias_precision = {4.0f};
    p.noise_precision = {2.0f};
    p.user_mu = {0.3f};
    p.user_lambda = {1.5f};
    return p;
}

// One draw from Normal(mu, Lambda^-1) for sample s's hyperparameters: with
// Lambda = U'U (Cholesky), x = mu + U^-1 z has covariance (U'U)^-1.
Eigen::VectorXd draw_prior(const std::vector<float>& mu, const std::vector<float>& lambda, uint32_t s, uint32_t K,
                           Rng& rng) {
    Eigen::MatrixXd L(K, K);
    Eigen::VectorXd m(K), z(K);
    for (uint32_t a = 0; a < K; ++a) {
        m(a) = mu[s * K + a];
        z(a) = rng.normal();
        for (uint32_t b = 0; b < K; ++b) L(a, b) = lambda[(s * K + a) * K + b];
    }
    return m + Eigen::LLT<Eigen::MatrixXd>(L).matrixU().solve(z);
}

struct Draws {
    std::vector<double> ratings;
    double mean = 0, var = 0, fourth = 0;  // sample mean, variance, fourth central moment
};

// Brute force: `per_sample` draws of a rating under every kept sample s (so
// the samples have equal weight, as in the mixture), drawing each unseen
// side's factor and bias from that sample's hyperparameter prior.
Draws simulate_ratings(const Posterior& p, std::optional<uint32_t> user, std::optional<uint32_t> item,
                       int per_sample, uint64_t seed) {
    Rng rng(seed);
    const uint32_t K = p.rank;
    Draws d;
    for (uint32_t s = 0; s < p.num_samples; ++s)
        for (int k = 0; k < per_sample; ++k) {
            Eigen::VectorXd u(K), v(K);
            double bu = 0, bv = 0;
            if (user) {
                for (uint32_t j = 0; j < K; ++j) u(j) = p.user_factor(s, *user)[j];
                bu = p.user_bias_of(s, *user);
            } else {
                u = draw_prior(p.user_mu, p.user_lambda, s, K, rng);
                if (p.has_biases) bu = rng.normal() / std::sqrt(double(p.user_bias_precision[s]));
            }
            if (item) {
                for (uint32_t j = 0; j < K; ++j) v(j) = p.item_factor(s, *item)[j];
                bv = p.item_bias_of(s, *item);
            } else {
                v = draw_prior(p.item_mu, p.item_lambda, s, K, rng);
                if (p.has_biases) bv = rng.normal() / std::sqrt(double(p.item_bias_precision[s]));
            }
            const double noise = rng.normal() / std::sqrt(double(p.noise_precision[s]));
            d.ratings.push_back(p.global_mean + bu + bv + u.dot(v) + noise);
        }
    const double n = double(d.ratings.size());
    for (double r : d.ratings) d.mean += r / n;
    for (double r : d.ratings) {
        d.var += (r - d.mean) * (r - d.mean) / n;
        d.fourth += std::pow(r - d.mean, 4) / n;
    }
    return d;
}

}  // namespace

// With one known side the per-sample predictive of an unseen user is exactly
// Normal(g + c_i + mu.v, 1/tau + v' Lambda^-1 v + 1/lambda_b) (a linear map of
// Gaussians; Bishop 2006, eq. 2.115). Checked against Monte Carlo draws of the
// unseen user: mean within 4 standard errors.
TEST_CASE("population answers for an unseen user match simulated users") {
    const Posterior p = tiny();
    const Prediction got = population_prediction(p, hyperparameter_covariances(p), std::nullopt, 0u, 0.9);
    const double mean = 3.0 + 0.2 + 0.3 * 0.8;
    const double var = 1.0 / 2.0 + 0.8 * 0.8 / 1.5 + 1.0 / 4.0;
    CHECK(got.mean == Approx(mean).epsilon(1e-6));
    CHECK(got.sd == Approx(std::sqrt(var)).epsilon(1e-6));
    // Simulate: u ~ N(0.3, 1/1.5), b ~ N(0, 1/4), r ~ N(3 + b + 0.2 + u*0.8, 1/2).
    Rng rng(5);
    const int n = 100000;
    double sum = 0, sum_sq = 0;
    for (int k = 0; k < n; ++k) {
        const double u = 0.3 + rng.normal() / std::sqrt(1.5), b = rng.normal() / 2.0;
        const double r = 3.0 + b + 0.2 + u * 0.8 + rng.normal() / std::sqrt(2.0);
        sum += r;
        sum_sq += r * r;
    }
    const double sim_mean = sum / n, sim_var = sum_sq / n - sim_mean * sim_mean;
    CHECK(std::abs(got.mean - sim_mean) < 4 * std::sqrt(var / n));
    CHECK(std::abs(got.sd * got.sd - sim_var) < 4 * var * std::sqrt(2.0 / (n - 1)));
    // Interval: the 5% and 95% points of that Normal (z = 1.6448536, a
    // standard table value, Abramowitz & Stegun 26.2), clipped to [1, 5].
    CHECK(got.lower == Approx(std::max(1.0, mean - 1.6448536 * std::sqrt(var))).epsilon(1e-4));
    CHECK(got.upper == Approx(std::min(5.0, mean + 1.6448536 * std::sqrt(var))).epsilon(1e-4));
}

// Brute-force Monte Carlo of the per-sample integral over the unseen factors
// and biases, 40000 draws under each of 4 samples (n = 160000 in all), on a
// rank-3 model with biases. Tolerances, 4 Monte Carlo standard errors:
//   mean      sd / sqrt(n)
//   variance  sqrt((m4 - var^2) / n), m4 the draws' fourth central moment
//             (the draws are not normal when both sides are unseen)
//   interval  the share of draws below the lower (above the upper) bound is
//             (1 - level) / 2 within 4 sqrt(q (1 - q) / n), a binomial
//             proportion; checked only when one side is known, where each
//             sample's predictive is exactly normal. With both unseen the
//             answer matches moments only (documented in population.hpp).
// The draws are stratified (equal counts per sample, as the mixture weighs
// them); stratified estimates have at most the error of i.i.d. draws from
// the mixture (Cochran, Sampling Techniques, 3rd ed. 1977, section 5.6,
// proportional allocation), so the i.i.d. standard errors above are safe.
TEST_CASE("population answers match a brute-force Monte Carlo of the per-sample integral") {
    const Posterior p = simulate_posterior({.users = 6, .items = 9, .rank = 3, .samples = 4, .chains = 2, .seed = 8});
    const HyperparameterCovariances cov = hyperparameter_covariances(p);
    const double level = 0.8, q = (1.0 - level) / 2.0;
    struct Case {
        const char* name;
        std::optional<uint32_t> user, item;
        bool normal;
    };
    const Case cases[] = {{"unseen user, known item", std::nullopt, 4u, true},
                          {"known user, unseen item", 2u, std::nullopt, true},
                          {"both unseen", std::nullopt, std::nullopt, false}};
    uint64_t seed = 21;
    for (const Case& c : cases) {
        INFO(c.name);
        const Prediction got = population_prediction(p, cov, c.user, c.item, level);
        const Draws d = simulate_ratings(p, c.user, c.item, 40000, seed++);
        const double n = double(d.ratings.size());
        // The mean must lie inside the scale, else clipping hides it.
        REQUIRE(got.mean > p.scale.min);
        REQUIRE(got.mean < p.scale.max);
        CHECK(std::abs(got.mean - d.mean) < 4 * std::sqrt(d.var / n));
        CHECK(std::abs(got.sd * got.sd - d.var) < 4 * std::sqrt((d.fourth - d.var * d.var) / n));
        if (!c.normal) continue;
        const double below = double(std::count_if(d.ratings.begin(), d.ratings.end(),
                                                  [&](double r) { return r < got.lower; })) / n;
        const double above = double(std::count_if(d.ratings.begin(), d.ratings.end(),
                                                  [&](double r) { return r > got.upper; })) / n;
        REQUIRE(got.lower > p.scale.min);
        REQUIRE(got.upper < p.scale.max);
        CHECK(std::abs(below - q) < 4 * std::sqrt(q * (1 - q) / n));
        CHECK(std::abs(above - q) < 4 * std::sqrt(q * (1 - q) / n));
    }
}

TEST_CASE("with both sides known the population answer is the model's own prediction") {
    auto p = std::make_shared<const Posterior>(
        simulate_posterior({.users = 6, .items = 9, .rank = 3, .samples = 4, .chains = 2, .seed = 8}));
    const Prediction got = population_prediction(*p, hyperparameter_covariances(*p), 1u, 5u, 0.9);
    const Prediction want = PredictionEngine(p).predict(1, 5, 0.9);
    // Per-sample means in float (Posterior::sample_prediction) here, in double
    // in the engine: agreement to float rounding, about 1e-7 relative.
    CHECK(got.mean == Approx(want.mean).epsilon(1e-5));
    CHECK(got.sd == Approx(want.sd).epsilon(1e-5));
    CHECK(got.lower == Approx(want.lower).epsilon(1e-5));
    CHECK(got.upper == Approx(want.upper).epsilon(1e-5));
}

TEST_CASE("population answers refuse arguments that break the contract") {
    const Posterior p = simulate_posterior({.users = 4, .items = 5, .rank = 2, .samples = 3, .chains = 1});
    const HyperparameterCovariances cov = hyperparameter_covariances(p);
    CHECK_THROWS_AS(population_prediction(p, cov, std::nullopt, 5u, 0.9), std::out_of_range);
    CHECK_THROWS_AS(population_prediction(p, cov, 4u, std::nullopt, 0.9), std::out_of_range);
    CHECK_THROWS_AS(population_prediction(p, cov, std::nullopt, std::nullopt, 1.0), std::invalid_argument);
    CHECK_THROWS_AS(population_prediction(p, cov, std::nullopt, std::nullopt, 0.0), std::invalid_argument);
    const Posterior other = simulate_posterior({.users = 4, .items = 5, .rank = 3, .samples = 3, .chains = 1});
    CHECK_THROWS_AS(population_prediction(p, hyperparameter_covariances(other), std::nullopt, 0u, 0.9),
                    std::invalid_argument);
    CHECK_NOTHROW(population_prediction(p, cov, std::nullopt, 4u, 0.9));
}
