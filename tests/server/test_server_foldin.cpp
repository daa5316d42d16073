// Tests for server/foldin and server/population: the visitor's draws follow
// the exact Gaussian conditional, and population answers for unseen ids have
// the exact per-sample mean and variance.
#include <catch2/catch.hpp>

#include <cmath>
#include <vector>

#include "model/predict/predict.hpp"
#include "model/math/random.hpp"
#include "tests/support/simulate.hpp"
#include "server/foldin.hpp"
#include "server/model_slot.hpp"
#include "server/population.hpp"

using namespace credence;
using namespace credence::server;

namespace {

// A one-sample, rank-1 model with chosen numbers.
Posterior tiny(bool biases) {
    Posterior p = simulate_posterior({.users = 3, .items = 4, .rank = 1, .samples = 1, .chains = 1, .biases = biases});
    p.global_mean = 3.0f;
    p.item_factors = {0.8f, -0.5f, 1.2f, 0.1f};
    if (biases) {
        p.item_bias = {0.2f, -0.1f, 0.0f, 0.3f};
        p.user_bias_precision = {4.0f};
    }
    p.noise_precision = {2.0f};
    p.user_mu = {0.3f};
    p.user_lambda = {1.5f};
    return p;
}

struct Moments {
    std::vector<double> mean, var;
};

// Mean and variance of each coordinate (factor, then bias) over many seeds.
Moments draw_moments(const Posterior& p, const std::vector<VisitorRating>& ratings, int draws) {
    const int D = p.has_biases ? 2 : 1;
    std::vector<double> sum(D, 0.0), sum_sq(D, 0.0);
    for (int k = 0; k < draws; ++k) {
        const auto v = fold_in_visitor(p, ratings, 1000 + k);
        const double x[2] = {v.factors[0], v.bias[0]};
        for (int d = 0; d < D; ++d) {
            sum[d] += x[d];
            sum_sq[d] += x[d] * x[d];
        }
    }
    Moments m;
    for (int d = 0; d < D; ++d) {
        m.mean.push_back(sum[d] / draws);
        m.var.push_back(sum_sq[d] / draws - m.mean[d] * m.mean[d]);
    }
    return m;
}

}  // namespace

// Conditional of a Gaussian prior under Gaussian observations (Bayesian linear
// regression posterior): P = P0 + tau Phi'Phi, mean = P^-1 (P0 m0 + tau Phi' t).
// Source: C. M. Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.50-3.51.
// Tolerances: 4 Monte Carlo standard errors, sd/sqrt(n) for means and
// var*sqrt(2/(n-1)) for variances (normal draws), n = 20000.
TEST_CASE("fold-in draws follow the exact conditional (rank 1, no biases)") {
    const Posterior p = tiny(false);
    const int n = 20000;
    SECTION("no ratings: the prior") {
        const auto m = draw_moments(p, {}, n);
        const double var = 1.0 / 1.5;
        CHECK(std::abs(m.mean[0] - 0.3) < 4 * std::sqrt(var / n));
        CHECK(std::abs(m.var[0] - var) < 4 * var * std::sqrt(2.0 / (n - 1)));
    }
    SECTION("two ratings") {
        const std::vector<VisitorRating> r = {{0, 4.5}, {1, 2.0}};
        const double P = 1.5 + 2.0 * (0.8 * 0.8 + 0.5 * 0.5);
        const double mean = (1.5 * 0.3 + 2.0 * (0.8 * 1.5 + (-0.5) * (-1.0))) / P;
        const auto m = draw_moments(p, r, n);
        CHECK(std::abs(m.mean[0] - mean) < 4 * std::sqrt(1.0 / P / n));
        CHECK(std::abs(m.var[0] - 1.0 / P) < 4 * (1.0 / P) * std::sqrt(2.0 / (n - 1)));
    }
    SECTION("a seed reproduces the draw exactly") {
        const std::vector<VisitorRating> one = {{2, 5.0}};
        const auto a = fold_in_visitor(p, one, 77), b = fold_in_visitor(p, one, 77);
        CHECK(a.factors == b.factors);
        CHECK(fold_in_visitor(p, one, 78).factors != a.factors);
    }
}

TEST_CASE("fold-in draws factor and bias jointly (rank 1 with biases)") {
    const Posterior p = tiny(true);
    const std::vector<VisitorRating> r = {{0, 4.5}, {2, 1.0}, {3, 3.5}};
    // y_j = [v_j, 1]; P = diag(1.5, 4) + 2 sum y y'; h = [1.5*0.3, 0] + 2 sum y (r - 3 - c_j).
    const double v[3] = {0.8, 1.2, 0.1}, c[3] = {0.2, 0.0, 0.3}, t[3] = {4.5, 1.0, 3.5};
    double P00 = 1.5, P01 = 0, P11 = 4.0, h0 = 1.5 * 0.3, h1 = 0;
    for (int j = 0; j < 3; ++j) {
        P00 += 2 * v[j] * v[j];
        P01 += 2 * v[j];
        P11 += 2;
        h0 += 2 * v[j] * (t[j] - 3.0 - c[j]);
        h1 += 2 * (t[j] - 3.0 - c[j]);
    }
    const double det = P00 * P11 - P01 * P01;
    const double cov00 = P11 / det, cov11 = P00 / det;
    const double mean0 = (P11 * h0 - P01 * h1) / det, mean1 = (P00 * h1 - P01 * h0) / det;
    const int n = 20000;
    const auto m = draw_moments(p, r, n);
    CHECK(std::abs(m.mean[0] - mean0) < 4 * std::sqrt(cov00 / n));
    CHECK(std::abs(m.mean[1] - mean1) < 4 * std::sqrt(cov11 / n));
    CHECK(std::abs(m.var[0] - cov00) < 4 * cov00 * std::sqrt(2.0 / (n - 1)));
    CHECK(std::abs(m.var[1] - cov11) < 4 * cov11 * std::sqrt(2.0 / (n - 1)));
}

// With one known side the per-sample predictive of an unseen user is exactly
// Normal(g + c_i + mu.v, 1/tau + v' Lambda^-1 v + 1/lambda_b) (a linear map of
// Gaussians; Bishop 2006, eq. 2.115). Checked against Monte Carlo draws of the
// unseen user: mean within 4 standard errors.
TEST_CASE("population answers for an unseen user match simulated users") {
    auto posterior = std::make_shared<const Posterior>(tiny(true));
    const auto model = build_loaded_model(posterior, "");
    const Prediction got = population_prediction(*model, std::nullopt, 0u, 0.9);
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
