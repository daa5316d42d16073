// Tests for model/predict/foldin: the visitor's draws follow the exact
// Gaussian conditional of each kept sample, ratings are checked, the exact
// (integrated) predictive matches a Monte Carlo estimate over many draws,
// answers are deterministic, and the visitor's top-N is exact for every
// ranking.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <iterator>
#include <limits>
#include <memory>
#include <optional>
#include <stdexcept>
#include <vector>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/mixture.hpp"
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

// ---- Exact fold-in: the visitor integrated out.

namespace {

// The per-sample predictive of a rating of `item` for a visitor whose draw
// under sample s is (x, b): g + c_i + b + x . V_i.
double drawn_mean(const Posterior& p, const VisitorFactors& v, uint32_t s, uint32_t item) {
    double m = double(p.global_mean) + p.item_bias_of(s, item) + v.bias[s];
    for (uint32_t k = 0; k < p.rank; ++k) m += double(v.factors[s * p.rank + k]) * p.item_factor(s, item)[k];
    return m;
}

double phi(double z) { return 0.5 * std::erfc(-z / std::sqrt(2.0)); }

// Every candidate's exact score, sorted: higher first, then lower index.
std::vector<std::pair<uint32_t, double>> brute_force_ranking(const Posterior& p, const VisitorPosterior& v,
                                                             const std::vector<uint32_t>& pool, RankBy rank_by,
                                                             double level) {
    std::vector<std::pair<uint32_t, double>> all;
    std::vector<double> means, precisions;
    for (uint32_t i : pool) {
        visitor_components(p, v, i, means, precisions);
        const double score = rank_by == RankBy::mean    ? mixture_mean(means)
                             : rank_by == RankBy::lower ? mixture_quantile(means, precisions, 0.5 * (1.0 - level))
                                                        : mixture_quantile(means, precisions, 0.5 * (1.0 + level));
        all.emplace_back(i, score);
    }
    std::sort(all.begin(), all.end(), [](const auto& a, const auto& b) {
        return a.second > b.second || (a.second == b.second && a.first < b.first);
    });
    return all;
}

}  // namespace

// The exact answer against a Monte Carlo estimate from many visitor draws:
// under each sample the visitor's draws x_n give ratings Normal(m_s(x_n),
// 1/tau_s), so averaging over n = 20000 draws (fold_in_visitor, seeds
// 1..n) estimates the integrated predictive. Tolerances are 4 Monte Carlo
// standard errors: sd/sqrt(n) for means, var sqrt(2/(n-1)) for the variance
// of a normal, and for the mixture's variance and CDF the sd over draws of
// the per-draw quantity (mean over samples), divided by sqrt(n).
TEST_CASE("the exact visitor predictive matches a Monte Carlo estimate over many visitor draws") {
    for (const bool biases : {true, false}) {
        INFO("biases " << biases);
        const Posterior p = simulate_posterior(
            {.users = 6, .items = 30, .rank = 3, .samples = 6, .chains = 2, .biases = biases, .seed = 12});
        const std::vector<VisitorRating> ratings = {{4, 4.5}, {9, 2.0}, {21, 3.5}};
        const VisitorPosterior exact = fold_in(p, ratings);
        const uint32_t S = p.num_samples;
        const int n = 20000;
        const uint32_t items[] = {0, 4, 17, 29};  // 4 was rated
        const double level = 0.8;
        struct Accumulator {
            std::vector<double> sum, sum_sq;  // per sample: m_s(x)
            double var_sum = 0, var_sum_sq = 0, cdf_lo_sum = 0, cdf_lo_sq = 0, cdf_hi_sum = 0, cdf_hi_sq = 0;
        };
        std::vector<Accumulator> acc(std::size(items));
        std::vector<std::vector<double>> means(std::size(items)), precisions(std::size(items));
        std::vector<Prediction> predicted;
        std::vector<double> q_lo, q_hi;  // unclipped interval bounds
        for (size_t j = 0; j < std::size(items); ++j) {
            visitor_components(p, exact, items[j], means[j], precisions[j]);
            predicted.push_back(predict_for_visitor(p, exact, items[j], level));
            q_lo.push_back(mixture_quantile(means[j], precisions[j], 0.5 * (1.0 - level)));
            q_hi.push_back(mixture_quantile(means[j], precisions[j], 0.5 * (1.0 + level)));
            acc[j].sum.assign(S, 0.0);
            acc[j].sum_sq.assign(S, 0.0);
        }
        for (int draw = 1; draw <= n; ++draw) {
            const VisitorFactors v = fold_in_visitor(p, ratings, uint64_t(draw));
            for (size_t j = 0; j < std::size(items); ++j) {
                const double mu = mixture_mean(means[j]);
                double var = 0, lo = 0, hi = 0;
                for (uint32_t s = 0; s < S; ++s) {
                    const double m = drawn_mean(p, v, s, items[j]);
                    acc[j].sum[s] += m;
                    acc[j].sum_sq[s] += m * m;
                    const double noise_var = 1.0 / p.noise_precision[s];
                    var += ((m - mu) * (m - mu) + noise_var) / S;
                    lo += phi((q_lo[j] - m) / std::sqrt(noise_var)) / S;
                    hi += phi((q_hi[j] - m) / std::sqrt(noise_var)) / S;
                }
                acc[j].var_sum += var, acc[j].var_sum_sq += var * var;
                acc[j].cdf_lo_sum += lo, acc[j].cdf_lo_sq += lo * lo;
                acc[j].cdf_hi_sum += hi, acc[j].cdf_hi_sq += hi * hi;
            }
        }
        auto mc = [&](double sum, double sum_sq) {
            const double mean = sum / n;
            return std::pair{mean, std::sqrt(std::max(0.0, sum_sq / n - mean * mean) / n)};
        };
        for (size_t j = 0; j < std::size(items); ++j) {
            INFO("item " << items[j]);
            for (uint32_t s = 0; s < S; ++s) {
                INFO("sample " << s);
                const double mean = acc[j].sum[s] / n, var = acc[j].sum_sq[s] / n - mean * mean;
                const double want_var = 1.0 / precisions[j][s] - 1.0 / p.noise_precision[s];
                CHECK(std::abs(mean - means[j][s]) < 4 * std::sqrt(want_var / n));
                CHECK(std::abs(var - want_var) < 4 * want_var * std::sqrt(2.0 / (n - 1)));
            }
            // Mixture moments: the Prediction's sd against the Monte Carlo variance.
            const auto [var, var_se] = mc(acc[j].var_sum, acc[j].var_sum_sq);
            CHECK(std::abs(predicted[j].sd * predicted[j].sd - var) < 4 * var_se);
            // Quantiles: the Monte Carlo CDF at the exact interval bounds is
            // (1 -+ level) / 2; the Prediction carries them clipped to the scale.
            CHECK(predicted[j].lower == std::clamp(q_lo[j], double(p.scale.min), double(p.scale.max)));
            CHECK(predicted[j].upper == std::clamp(q_hi[j], double(p.scale.min), double(p.scale.max)));
            CHECK(predicted[j].mean == std::clamp(mixture_mean(means[j]), double(p.scale.min), double(p.scale.max)));
            const auto [lo, lo_se] = mc(acc[j].cdf_lo_sum, acc[j].cdf_lo_sq);
            const auto [hi, hi_se] = mc(acc[j].cdf_hi_sum, acc[j].cdf_hi_sq);
            CHECK(std::abs(lo - 0.1) < 4 * lo_se);
            CHECK(std::abs(hi - 0.9) < 4 * hi_se);
        }
    }
}

TEST_CASE("the visitor's components: the reference mean with the conditional mean factor, and y' P^-1 y + 1/tau") {
    const Posterior p = simulate_posterior({.users = 5, .items = 12, .rank = 2, .samples = 3, .chains = 1, .seed = 4});
    const std::vector<VisitorRating> ratings = {{3, 4.0}, {7, 2.5}, {11, 5.0}, {0, 1.0}};
    const VisitorPosterior v = fold_in(p, ratings);
    // The same precision and mean as in the draw test above (Bishop 2006,
    // eqs. 3.50-3.51), written out and inverted explicitly.
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        Eigen::Matrix3d P = Eigen::Matrix3d::Zero();
        Eigen::Vector3d mu0 = Eigen::Vector3d::Zero();
        for (uint32_t a = 0; a < 2; ++a) {
            mu0(a) = p.user_mu[s * 2 + a];
            for (uint32_t b = 0; b < 2; ++b) P(a, b) = p.user_lambda[(s * 2 + a) * 2 + b];
        }
        P(2, 2) = p.user_bias_precision[s];
        Eigen::Vector3d h = P * mu0;
        for (const auto& r : ratings) {
            const Eigen::Vector3d y(p.item_factor(s, r.item)[0], p.item_factor(s, r.item)[1], 1.0);
            P += p.noise_precision[s] * y * y.transpose();
            h += p.noise_precision[s] * (r.rating - p.global_mean - p.item_bias_of(s, r.item)) * y;
        }
        const Eigen::Matrix3d cov = P.inverse();
        const Eigen::Vector3d mean = cov * h;
        CHECK(v.factor_mean[s * 2] == Approx(mean(0)).epsilon(1e-6));
        CHECK(v.factor_mean[s * 2 + 1] == Approx(mean(1)).epsilon(1e-6));
        CHECK(v.bias_mean[s] == Approx(mean(2)).epsilon(1e-6));
        for (uint32_t i : {0u, 5u, 11u}) {
            std::vector<double> means, precisions;
            visitor_components(p, v, i, means, precisions);
            const Eigen::Vector3d y(p.item_factor(s, i)[0], p.item_factor(s, i)[1], 1.0);
            CHECK(means[s] == Approx(p.global_mean + p.item_bias_of(s, i) + mean.dot(y)).epsilon(1e-6));
            CHECK(1.0 / precisions[s] == Approx(y.dot(cov * y) + 1.0 / p.noise_precision[s]).epsilon(1e-10));
        }
    }
}

TEST_CASE("a visitor's answers are deterministic: no seed enters a mean, lower or upper ranking") {
    auto p = std::make_shared<const Posterior>(
        simulate_posterior({.users = 10, .items = 60, .rank = 3, .samples = 8, .chains = 2, .seed = 6}));
    const PredictionEngine engine(p);
    const std::vector<VisitorRating> ratings = {{17, 4.5}, {2, 1.0}, {30, 3.0}};
    for (const RankBy rank_by : {RankBy::mean, RankBy::lower, RankBy::upper}) {
        const RecommendOptions a{.n = 8, .rank_by = rank_by, .candidates = std::nullopt, .draw_seed = 1};
        const RecommendOptions b{.n = 8, .rank_by = rank_by, .candidates = std::nullopt, .draw_seed = 2};
        const auto first = recommend_for_visitor(engine, ratings, a);
        REQUIRE(first.size() == 8);
        CHECK(first == recommend_for_visitor(engine, ratings, a));
        CHECK(first == recommend_for_visitor(engine, ratings, b));
    }
    // A draw ranking is deterministic per seed, and seeds differ.
    const RecommendOptions d7{.n = 60, .rank_by = RankBy::draw, .exclude_rated = false, .candidates = std::nullopt,
                              .draw_seed = 7};
    const auto seven = recommend_for_visitor(engine, ratings, d7);
    CHECK(seven == recommend_for_visitor(engine, ratings, d7));
    bool some_seed_differs = false;
    for (uint64_t seed = 8; seed < 12 && !some_seed_differs; ++seed) {
        RecommendOptions other = d7;
        other.draw_seed = seed;
        some_seed_differs = recommend_for_visitor(engine, ratings, other) != seven;
    }
    CHECK(some_seed_differs);
}

TEST_CASE("a visitor's top-N by mean, lower and upper is exactly the sorted exact scores") {
    // Duplicated items tie exactly; ties break by item index.
    SimulatedPosteriorOptions spec{.users = 10, .items = 400, .rank = 4, .samples = 12, .chains = 2, .seed = 9};
    spec.duplicate_items = 20;
    auto p = std::make_shared<const Posterior>(simulate_posterior(spec));
    const PredictionEngine engine(p);
    const std::vector<VisitorRating> ratings = {{17, 4.5}, {2, 1.0}, {300, 3.0}, {385, 5.0}};
    const VisitorPosterior v = fold_in(*p, ratings);
    for (const RankBy rank_by : {RankBy::mean, RankBy::lower, RankBy::upper})
        for (const bool restricted : {false, true}) {
            INFO("rank_by " << int(rank_by) << ", candidates " << restricted);
            RecommendOptions o{.n = 15, .rank_by = rank_by, .level = 0.8, .candidates = std::nullopt};
            std::vector<uint32_t> pool;
            if (restricted) {
                o.candidates = std::vector<uint32_t>{};
                for (uint32_t i = 0; i < 400; i += 7) o.candidates->push_back(i);
                o.candidates->push_back(17);  // rated: still excluded
            }
            for (uint32_t i = 0; i < 400; ++i)
                if (i != 2 && i != 17 && i != 300 && i != 385 && (!restricted || i % 7 == 0)) pool.push_back(i);
            const auto want = brute_force_ranking(*p, v, pool, rank_by, o.level);
            const auto got = recommend_for_visitor(engine, ratings, o);
            REQUIRE(got.size() == 15);
            for (size_t k = 0; k < got.size(); ++k) {
                INFO("position " << k);
                CHECK(got[k].item == want[k].first);
                CHECK(got[k].score == want[k].second);
                CHECK(got[k].prediction == predict_for_visitor(*p, v, got[k].item, o.level));
            }
        }
}

TEST_CASE("a visitor's draw ranking uses one kept sample and one visitor draw under it") {
    auto p = std::make_shared<const Posterior>(
        simulate_posterior({.users = 10, .items = 50, .rank = 3, .samples = 9, .chains = 1, .seed = 3}));
    const PredictionEngine engine(p);
    const std::vector<VisitorRating> ratings = {{5, 2.0}, {8, 4.0}};
    const RecommendOptions o{.n = 10, .rank_by = RankBy::draw, .candidates = std::nullopt, .draw_seed = 4242};
    const uint32_t s = drawn_sample(o.draw_seed, p->num_samples);
    const VisitorFactors draw = fold_in_visitor(*p, ratings, o.draw_seed);
    const VisitorPosterior v = fold_in(*p, ratings);
    std::vector<std::pair<uint32_t, double>> want;
    for (uint32_t i = 0; i < 50; ++i)
        if (i != 5 && i != 8) want.emplace_back(i, drawn_mean(*p, draw, s, i));
    std::sort(want.begin(), want.end(), [](const auto& a, const auto& b) {
        return a.second > b.second || (a.second == b.second && a.first < b.first);
    });
    const auto got = recommend_for_visitor(engine, ratings, o);
    REQUIRE(got.size() == 10);
    for (size_t k = 0; k < got.size(); ++k) {
        INFO("position " << k);
        CHECK(got[k].item == want[k].first);
        // Two summation orders of the same double sum.
        CHECK(got[k].score == Approx(want[k].second).epsilon(1e-12));
        // The carried answer is the exact mixture, not the draw.
        CHECK(got[k].prediction == predict_for_visitor(*p, v, got[k].item, o.level));
    }
}

TEST_CASE("a visitor's rated items are excluded unless asked for, and bad options are refused") {
    auto p = std::make_shared<const Posterior>(
        simulate_posterior({.users = 10, .items = 40, .rank = 3, .samples = 8, .chains = 2, .seed = 6}));
    const PredictionEngine engine(p);
    const std::vector<VisitorRating> ratings = {{17, 4.5}, {2, 1.0}, {30, 3.0}};
    for (const RankBy rank_by : {RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}) {
        RecommendOptions o{.n = 40, .rank_by = rank_by, .candidates = std::nullopt};
        const auto some = recommend_for_visitor(engine, ratings, o);
        CHECK(some.size() == 37);
        for (const auto& r : some) CHECK((r.item != 2 && r.item != 17 && r.item != 30));
        o.exclude_rated = false;
        CHECK(recommend_for_visitor(engine, ratings, o).size() == 40);
        o.n = 0;
        CHECK_THROWS_AS(recommend_for_visitor(engine, ratings, o), OptionError);
        o.n = 5;
        o.level = 1.0;
        CHECK_THROWS_AS(recommend_for_visitor(engine, ratings, o), OptionError);
    }
    // No ratings: the prior visitor, still deterministic.
    const RecommendOptions cold{.n = 5, .rank_by = RankBy::lower, .candidates = std::nullopt};
    CHECK(recommend_for_visitor(engine, {}, cold) == recommend_for_visitor(engine, {}, cold));
    CHECK_THROWS_AS(predict_for_visitor(*p, fold_in(*p, ratings), 40, 0.9), std::out_of_range);
}
