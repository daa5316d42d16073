// Tests for model/predict/foldin: the visitor's draws follow the exact
// Gaussian conditional of each kept sample, ratings are checked, and the
// visitor's top-N is the engine's answer for the folded-in factors.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <limits>
#include <memory>
#include <optional>
#include <stdexcept>
#include <vector>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/predict.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

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

// The same conditional (Bishop 2006, eqs. 3.50-3.51) for rank 2 with biases
// and three kept samples, each with its own hyperparameters and item
// factors: every sample's draws must follow that sample's conditional. The
// reference mean and covariance come from an explicit matrix inverse of the
// precision written out from the formula. Tolerances as above: 4 standard
// errors per coordinate, n = 20000 draws.
TEST_CASE("fold-in draws follow each sample's own conditional (rank 2 with biases, 3 samples)") {
    const Posterior p = simulate_posterior({.users = 5, .items = 12, .rank = 2, .samples = 3, .chains = 1, .seed = 4});
    const std::vector<VisitorRating> ratings = {{3, 4.0}, {7, 2.5}, {11, 5.0}, {0, 1.0}};
    const uint32_t S = p.num_samples, K = p.rank;
    const int D = 3, n = 20000;
    std::vector<Eigen::Vector3d> want_mean(S);
    std::vector<Eigen::Matrix3d> want_cov(S);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Matrix3d P = Eigen::Matrix3d::Zero();
        Eigen::Vector3d mu0 = Eigen::Vector3d::Zero();
        for (uint32_t a = 0; a < K; ++a) {
            mu0(a) = p.user_mu[s * K + a];
            for (uint32_t b = 0; b < K; ++b) P(a, b) = p.user_lambda[(s * K + a) * K + b];
        }
        P(2, 2) = p.user_bias_precision[s];
        Eigen::Vector3d h = P * mu0;
        const double tau = p.noise_precision[s];
        for (const auto& r : ratings) {
            const Eigen::Vector3d y(p.item_factor(s, r.item)[0], p.item_factor(s, r.item)[1], 1.0);
            P += tau * y * y.transpose();
            h += tau * (r.rating - p.global_mean - p.item_bias_of(s, r.item)) * y;
        }
        want_cov[s] = P.inverse();
        want_mean[s] = want_cov[s] * h;
    }
    std::vector<Eigen::Vector3d> sum(S, Eigen::Vector3d::Zero()), sum_sq(S, Eigen::Vector3d::Zero());
    for (int k = 0; k < n; ++k) {
        const auto v = fold_in_visitor(p, ratings, 5000 + k);
        for (uint32_t s = 0; s < S; ++s) {
            const Eigen::Vector3d x(v.factors[s * K], v.factors[s * K + 1], v.bias[s]);
            sum[s] += x;
            sum_sq[s] += x.cwiseProduct(x);
        }
    }
    for (uint32_t s = 0; s < S; ++s)
        for (int d = 0; d < D; ++d) {
            INFO("sample " << s << ", coordinate " << d);
            const double mean = sum[s](d) / n, var = sum_sq[s](d) / n - mean * mean;
            const double want_var = want_cov[s](d, d);
            CHECK(std::abs(mean - want_mean[s](d)) < 4 * std::sqrt(want_var / n));
            CHECK(std::abs(var - want_var) < 4 * want_var * std::sqrt(2.0 / (n - 1)));
        }
}

TEST_CASE("visitor ratings outside the scale, rated twice or naming no item are refused") {
    const Posterior p = tiny(true);
    const auto refuses = [&](std::vector<VisitorRating> r) { CHECK_THROWS_AS(fold_in_visitor(p, r, 1), DataError); };
    refuses({{0, 5.5}});
    refuses({{0, 0.5}});
    refuses({{1, std::numeric_limits<double>::quiet_NaN()}});
    refuses({{2, 3.0}, {1, 4.0}, {2, 5.0}});
    // The message names the item by its id so a person can fix the request.
    try {
        check_visitor_ratings(p, std::vector<VisitorRating>{{3, 2.0}, {3, 2.0}});
        FAIL("a repeated item was accepted");
    } catch (const DataError& e) {
        CHECK(std::string(e.what()).find("'" + p.item_ids[3] + "'") != std::string::npos);
    }
    // An index beyond the model is the caller's bug, not the visitor's.
    CHECK_THROWS_AS(check_visitor_ratings(p, std::vector<VisitorRating>{{4, 3.0}}), std::out_of_range);
    // The scale's ends are inside it; no ratings at all is a valid visitor.
    CHECK_NOTHROW(check_visitor_ratings(p, std::vector<VisitorRating>{{0, 1.0}, {1, 5.0}}));
    CHECK_NOTHROW(check_visitor_ratings(p, std::vector<VisitorRating>{}));
}

TEST_CASE("a visitor's top-N is the engine's answer for the folded-in factors, rated items excluded") {
    auto p = std::make_shared<const Posterior>(
        simulate_posterior({.users = 10, .items = 40, .rank = 3, .samples = 8, .chains = 2, .seed = 6}));
    const PredictionEngine engine(p);
    const std::vector<VisitorRating> ratings = {{17, 4.5}, {2, 1.0}, {30, 3.0}};
    RecommendOptions o{.n = 7, .rank_by = RankBy::upper, .candidates = std::nullopt};
    const auto v = fold_in_visitor(*p, ratings, 99);
    const auto got = recommend_for_visitor(engine, ratings, 99, o);
    CHECK(got == engine.recommend_for_factors(v.factors, v.bias, std::vector<uint32_t>{2, 17, 30}, o));
    REQUIRE(got.size() == 7);
    for (const auto& r : got) CHECK((r.item != 2 && r.item != 17 && r.item != 30));
    // With exclude_rated off, the rated items compete like any other.
    o.exclude_rated = false;
    o.n = 40;
    const auto all = recommend_for_visitor(engine, ratings, 99, o);
    CHECK(all.size() == 40);
    CHECK(all == engine.recommend_for_factors(v.factors, v.bias, std::vector<uint32_t>{}, o));
    // Another seed draws another visitor.
    CHECK(fold_in_visitor(*p, ratings, 100).factors != v.factors);
}
