// Tests for offline evaluation (model/assess/evaluate.cpp).
#include <catch2/catch.hpp>

#include <omp.h>

#include <algorithm>
#include <cmath>
#include <memory>
#include <numbers>
#include <vector>

#include "model/assess/evaluate.hpp"
#include "model/error.hpp"
#include "model/math/random.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

std::shared_ptr<const Posterior> simulated(const SimulatedPosteriorOptions& options) {
    return std::make_shared<const Posterior>(simulate_posterior(options));
}

double direct_mean(const Posterior& p, uint32_t s, uint32_t u, uint32_t i) {
    double v = p.global_mean + double(p.user_bias_of(s, u)) + p.item_bias_of(s, i);
    for (uint32_t k = 0; k < p.rank; ++k) v += double(p.user_factor(s, u)[k]) * p.item_factor(s, i)[k];
    return v;
}

// A test set whose ratings are draws from the model's own predictive
// distribution: pick a kept sample uniformly, then add its rating noise.
// Ids are interned in reverse order, so the test set's indices differ from
// the posterior's and only the id strings connect them.
RatingSet predictive_draws(const Posterior& p, size_t count, uint64_t seed) {
    RatingSet test;
    for (uint32_t u = p.num_users; u-- > 0;) test.users.intern(p.user_ids[u]);
    for (uint32_t i = p.num_items; i-- > 0;) test.items.intern(p.item_ids[i]);
    Rng rng(seed);
    for (size_t k = 0; k < count; ++k) {
        const auto u = static_cast<uint32_t>(rng.below(p.num_users));
        const auto i = static_cast<uint32_t>(rng.below(p.num_items));
        const auto s = static_cast<uint32_t>(rng.below(p.num_samples));
        const double x = direct_mean(p, s, u, i) + rng.normal() / std::sqrt(double(p.noise_precision[s]));
        test.ratings.push_back({*test.users.find(p.user_ids[u]), *test.items.find(p.item_ids[i]), float(x)});
    }
    return test;
}

}  // namespace

TEST_CASE("coverage and PIT are calibrated when ratings come from the predictive distribution") {
    // Under the model, a rating drawn from its own predictive mixture falls
    // inside the central interval at level L with probability L, and its PIT
    // is Uniform(0,1) (probability integral transform, common practice). With
    // N = 6,000 independent pairs the coverage is Binomial(N, L)/N; the
    // tolerance is 4 binomial standard errors sqrt(L(1-L)/N), fixed seeds.
    // The scale is wide so clipping never acts.
    SimulatedPosteriorOptions opt{.users = 30, .items = 40, .rank = 3, .samples = 25, .chains = 1, .seed = 606};
    opt.scale = {-100.0f, 100.0f, true};
    opt.jitter_sd = 0.4;
    const auto post = simulated(opt);
    const PredictionEngine engine(post);
    const size_t N = 6000;
    const auto test = predictive_draws(*post, N, 7);
    const auto report = evaluate(engine, test, {});
    REQUIRE(report.rated == N);
    REQUIRE(report.coverage.size() == 4);
    for (double level : {0.5, 0.8, 0.9, 0.95}) {
        const std::string key = level == 0.5 ? "0.5" : level == 0.8 ? "0.8" : level == 0.9 ? "0.9" : "0.95";
        INFO("level " << key);
        REQUIRE(report.coverage.count(key) == 1);
        CHECK(std::abs(report.coverage.at(key) - level) < 4 * std::sqrt(level * (1 - level) / N));
    }
    // PIT: mean 1/2 (sd of the mean sqrt(1/12/N)); each decile holds 1/10
    // (binomial sd sqrt(0.09/N)); 4 standard errors each.
    REQUIRE(report.pit.size() == N);
    double mean = 0;
    std::vector<int> decile(10, 0);
    for (double v : report.pit) {
        mean += v / N;
        decile[std::min(9, int(v * 10))]++;
    }
    CHECK(std::abs(mean - 0.5) < 4 * std::sqrt(1.0 / 12 / N));
    for (int d : decile) CHECK(std::abs(double(d) / N - 0.1) < 4 * std::sqrt(0.09 / N));

    // A model that is too sure of itself (every tau x 4, so sd halves)
    // under-covers: the check above has power.
    auto narrow = std::make_shared<Posterior>(*post);
    for (auto& t : narrow->noise_precision) t *= 4.0f;
    const auto overconfident = evaluate(PredictionEngine(narrow), test, {});
    CHECK(overconfident.coverage.at("0.9") < 0.9 - 4 * std::sqrt(0.09 / N));
}

TEST_CASE("metrics match a hand computation, with clipping only where documented") {
    // Two samples, rank 1, no biases, global mean 3, scale [1, 5]:
    // pair (0,0): m = {3 + 1*1, 3 + 2*1} = {4, 5}, mean 4.5
    // pair (1,1): m = {3 + 3*1, 3 + 3*1} = {6, 6}, mean 6 -> clipped to 5
    Posterior p = simulate_posterior({.users = 2, .items = 2, .rank = 1, .samples = 2, .chains = 1,
                                      .biases = false, .zero_values = true});
    p.global_mean = 3.0f;
    // user_factors [S][U][K]
    p.user_factors = {1, 3, 2, 3};
    p.item_factors = {1, 1, 1, 1};
    p.noise_precision = {1.0f, 4.0f};
    p.validate();
    const auto post = std::make_shared<const Posterior>(p);
    RatingSet test;
    test.users.intern("cust-0001");
    test.users.intern("cust-0000");
    test.items.intern("sku-0001");
    test.items.intern("sku-0000");
    test.ratings = {{1, 1, 4.0f}, {0, 0, 5.0f}};  // (cust-0000, sku-0000) = 4, (cust-0001, sku-0001) = 5
    const auto report = evaluate(PredictionEngine(post), test, {});
    REQUIRE(report.rated == 2);
    // Errors of the clipped means: |4.5 - 4| = 0.5 and |5 - 5| = 0.
    CHECK(report.mae == Approx(0.25).margin(1e-12));
    CHECK(report.rmse == Approx(std::sqrt(0.125)).margin(1e-12));
    // Unclipped mixture density, normal pdf sqrt(tau/2pi) exp(-tau d^2/2).
    auto pdf = [](double tau, double d) { return std::sqrt(tau / (2 * std::numbers::pi)) * std::exp(-tau * d * d / 2); };
    const double lpd0 = std::log(0.5 * pdf(1, 0) + 0.5 * pdf(4, -1));  // x=4 vs m={4,5}
    const double lpd1 = std::log(0.5 * pdf(1, -1) + 0.5 * pdf(4, -1)); // x=5 vs m={6,6}
    CHECK(report.mean_log_predictive_density == Approx((lpd0 + lpd1) / 2).margin(1e-12));
    // PIT of x = 5 under m = {6, 6}: mean of Phi(-1) and Phi(-2) (Phi(-1) =
    // 0.158655253931457, Phi(-2) = 0.022750131948179, scipy.stats.norm.cdf,
    // recalled from memory).
    CHECK(report.pit[1] == Approx(0.5 * (0.158655253931457 + 0.022750131948179)).margin(1e-12));
    // Pair (1,1) at level 0.5: both unclipped bounds exceed 5 (F(5) is about
    // 0.09 < 0.25), so both clip to 5 and x = 5 lies on them: inside. Pair
    // (0,0): F(4) = 0.5*0.5 + 0.5*Phi(-2) = 0.261 > 0.25 and the median is
    // above 4, so 4 is inside too.
    CHECK(report.coverage.at("0.5") == 1.0);
}

TEST_CASE("pairs with unknown users or items are counted once and skipped") {
    const auto post = simulated({.users = 5, .items = 6, .rank = 2, .samples = 4, .chains = 1, .seed = 3});
    RatingSet test;
    const uint32_t known_u = test.users.intern("cust-0002"), stranger = test.users.intern("cust-9999");
    const uint32_t known_i = test.items.intern("sku-0004"), novelty = test.items.intern("sku-new-tea");
    test.ratings = {{known_u, known_i, 4.0f}, {stranger, known_i, 3.0f}, {known_u, novelty, 2.0f},
                    {stranger, novelty, 1.0f}, {known_u, known_i, 2.0f}};
    const PredictionEngine engine(post);
    const auto report = evaluate(engine, test, {});
    CHECK(report.rated == 2);
    CHECK(report.unknown_users == 2);  // the stranger, with either item
    CHECK(report.unknown_items == 1);
    CHECK(report.pit.size() == 2);
    // The rated pairs are (cust-0002, sku-0004) = posterior (2, 4).
    std::vector<double> m;
    engine.sample_means(2, 4, m);
    CHECK(report.pit[0] == Approx(mixture_cdf(m, post->noise_precision, 4.0)).margin(1e-15));
    CHECK(report.mae == Approx((std::abs(std::clamp(mixture_mean(m), 1.0, 5.0) - 4.0) +
                                std::abs(std::clamp(mixture_mean(m), 1.0, 5.0) - 2.0)) / 2).margin(1e-12));
}

TEST_CASE("evaluation does not depend on the thread count") {
    const auto post = simulated({.users = 20, .items = 30, .rank = 4, .samples = 15, .chains = 1, .seed = 9});
    const PredictionEngine engine(post);
    const auto test = predictive_draws(*post, 3000, 1);
    const int threads = omp_get_max_threads();
    omp_set_num_threads(1);
    const auto one = evaluate(engine, test, {});
    omp_set_num_threads(std::max(2, threads));
    const auto many = evaluate(engine, test, {});
    omp_set_num_threads(threads);
    CHECK(one.rmse == many.rmse);
    CHECK(one.mean_log_predictive_density == many.mean_log_predictive_density);
    CHECK(one.coverage == many.coverage);
    CHECK(one.pit == many.pit);
}

TEST_CASE("report serializes to JSON and rejects bad levels") {
    const auto post = simulated({.users = 3, .items = 3, .rank = 2, .samples = 4, .chains = 1, .seed = 4});
    const PredictionEngine engine(post);
    RatingSet test;
    test.users.intern("cust-0001");
    test.items.intern("sku-0002");
    test.ratings = {{0, 0, 3.0f}};
    auto json = to_json(evaluate(engine, test, {}));
    CHECK(json["rated"] == 1);
    CHECK(json["unknown_users"] == 0);
    CHECK(json["unknown_items"] == 0);
    for (const char* key : {"0.5", "0.8", "0.9", "0.95"}) CHECK(json["coverage"].contains(key));
    CHECK(json["rmse"].is_number());
    CHECK(json["mae"].is_number());
    CHECK(json["mean_log_predictive_density"].is_number());
    // Nothing rated: metrics are null, counts still reported.
    test.ratings = {};
    json = to_json(evaluate(engine, test, {}));
    CHECK(json["rmse"].is_null());
    CHECK(json["coverage"]["0.9"].is_null());
    CHECK(json["rated"] == 0);
    CHECK_THROWS_AS(evaluate(engine, test, EvaluationOptions{.coverage_levels = {0.9, 1.0}}), OptionError);
}

TEST_CASE("coverage curve and PIT histogram are calibrated on ratings simulated from the model") {
    // As above: ratings drawn from the model's own predictive mixture, so the
    // PIT values are iid Uniform(0,1) and the coverage at level L is
    // Binomial(N, L)/N. Tolerance: 4 binomial standard errors
    // sqrt(L(1-L)/N) at each of the 18 levels (two-sided 4-sigma: about 6e-5
    // per level), fixed seeds.
    SimulatedPosteriorOptions opt{.users = 30, .items = 40, .rank = 3, .samples = 25, .chains = 1, .seed = 707};
    opt.scale = {-100.0f, 100.0f, true};
    opt.jitter_sd = 0.4;
    const auto post = simulated(opt);
    const PredictionEngine engine(post);
    const size_t N = 6000;
    const auto report = evaluate(engine, predictive_draws(*post, N, 11), {});
    REQUIRE(report.coverage_curve.size() == 18);
    CHECK(report.coverage_curve.front().level == 0.1);
    CHECK(report.coverage_curve.back().level == 0.95);
    for (const auto& point : report.coverage_curve) {
        INFO("level " << point.level);
        CHECK(point.total == N);
        CHECK(std::abs(point.coverage - point.level) < 4 * std::sqrt(point.level * (1 - point.level) / N));
    }
    // Histogram: 10 bins, chi-square with 9 degrees of freedom below its
    // 0.999 quantile 27.877 (scipy.stats.chi2.ppf(0.999, 9)).
    REQUIRE(report.pit_histogram.counts.size() == 10);
    CHECK(report.pit_histogram.total == N);
    CHECK(report.pit_histogram.chi_square < 27.877);

    // The curve has power: halving every predictive sd (tau x 4) pulls the
    // 0.5-level coverage far below nominal.
    auto narrow = std::make_shared<Posterior>(*post);
    for (auto& t : narrow->noise_precision) t *= 4.0f;
    const auto overconfident = evaluate(PredictionEngine(narrow), predictive_draws(*post, N, 11), {});
    CHECK(overconfident.coverage_curve[8].level == 0.5);
    CHECK(overconfident.coverage_curve[8].coverage < 0.5 - 4 * std::sqrt(0.25 / N));
    CHECK(overconfident.pit_histogram.chi_square > 27.877);
}

namespace {

// Two customers, six products, rank 1, no biases, global mean 3, tau = 100
// (sd 0.1), four identical samples except product 2, whose factor alternates
// -1.5, 2.5 (mean 0.5, wide). Customer 0 has factor +1 and rated product 0 in
// training; customer 1 has factor -1 and rated nothing.
// Sample means: customer 0: p0 4.5, p1 4.0, p2 {1.5, 5.5}, p3 3.0, p4 2.5, p5 2.0
//               customer 1: p0 1.5, p1 2.0, p2 {4.5, 0.5}, p3 3.0, p4 3.5, p5 4.0
std::shared_ptr<const Posterior> ranking_posterior() {
    Posterior p = simulate_posterior({.users = 2, .items = 6, .rank = 1, .samples = 4, .chains = 1,
                                      .biases = false, .zero_values = true});
    p.global_mean = 3.0f;
    const float item_value[6] = {1.5f, 1.0f, 0.0f, 0.0f, -0.5f, -1.0f};
    for (uint32_t s = 0; s < 4; ++s) {
        p.user_factors[s * 2 + 0] = 1.0f;
        p.user_factors[s * 2 + 1] = -1.0f;
        for (uint32_t i = 0; i < 6; ++i) p.item_factors[s * 6 + i] = item_value[i];
        p.item_factors[s * 6 + 2] = (s % 2 == 0) ? -1.5f : 2.5f;
        p.noise_precision[s] = 100.0f;
    }
    p.rated_offsets = {0, 1, 1};
    p.rated_items = {0};
    p.validate();
    return std::make_shared<const Posterior>(p);
}

}  // namespace

TEST_CASE("ranking metrics per rank_by mode match a hand-worked example") {
    // Held out: customer 0: p1 = 5, p3 = 4, p5 = 2; customer 1: p5 = 5, p0 = 1.
    // k = 2, relevance threshold 4 (so relevant: c0 {p1, p3}, c1 {p5}), graded gains.
    // Top-2 lists (p0 is excluded for c0, rated in training):
    //   mean:  c0 [p1 4.0, p2 3.5]  c1 [p5 4.0, p4 3.5]
    //   lower (90%): c0 [p1 3.84, p3 2.84] (p2's lower bound is about 1.37)
    //                c1 [p5 3.84, p4 3.34]
    //   upper (90%): c0 [p2 ~5.6, p1 4.16]  c1 [p2 ~4.6, p5 4.16]
    // Per customer (precision, recall, NDCG; IDCG c0 = 5 + 4/log2(3), c1 = 5):
    //   mean:  c0 (1/2, 1/2, 5/IDCG = 0.664565)      c1 (1/2, 1, 1)
    //   lower: c0 (1, 1, 1)                          c1 (1/2, 1, 1)
    //   upper: c0 (1/2, 1/2, (5/log2 3)/IDCG = 0.419294)  c1 (1/2, 1, (5/log2 3)/5 = 0.630930)
    // Catalogue coverage: mean {1,2,4,5} 4/6, lower {1,3,4,5} 4/6, upper {1,2,5} 3/6.
    // NDCG figures computed by hand with python3 math.log2.
    const auto post = ranking_posterior();
    RatingSet test;
    for (uint32_t u = 0; u < 2; ++u) test.users.intern(post->user_ids[u]);
    for (uint32_t i = 0; i < 6; ++i) test.items.intern(post->item_ids[i]);
    test.ratings = {{0, 1, 5.0f}, {0, 3, 4.0f}, {0, 5, 2.0f}, {1, 5, 5.0f}, {1, 0, 1.0f}};
    EvaluationOptions options;
    options.ranking_k = 2;
    options.relevance_threshold = 4.0;
    const auto report = evaluate(PredictionEngine(post), test, options);
    REQUIRE(report.ranking.size() == 4);
    struct Expected {
        const char* mode;
        double precision, recall, ndcg, coverage;
    };
    const Expected expected[] = {{"mean", 0.5, 0.75, (0.664565 + 1) / 2, 4.0 / 6},
                                 {"lower", 0.75, 1.0, 1.0, 4.0 / 6},
                                 {"upper", 0.5, 0.75, (0.419294 + 0.630930) / 2, 3.0 / 6}};
    for (size_t j = 0; j < 3; ++j) {
        const auto& [mode, m] = report.ranking[j];
        INFO("rank_by " << mode);
        CHECK(mode == expected[j].mode);
        CHECK(m.k == 2);
        CHECK(m.users_evaluated == 2);
        CHECK(m.precision_at_k == Approx(expected[j].precision).margin(1e-12));
        CHECK(m.recall_at_k == Approx(expected[j].recall).margin(1e-12));
        CHECK(m.ndcg_at_k == Approx(expected[j].ndcg).margin(1e-6));
        CHECK(m.catalogue_coverage == Approx(expected[j].coverage).margin(1e-12));
    }
    // draw: each customer sees one sample. c0 gets the upper-like list when
    // its p2 draw is 5.5, else the lower-like one; c1 gets the upper-like
    // list when its p2 draw is 4.5, else the mean one. Whatever the draws,
    // the averages are one of these four combinations.
    const auto& draw = report.ranking[3];
    CHECK(draw.rank_by == "draw");
    const double c0[2][3] = {{0.5, 0.5, 0.419294}, {1, 1, 1}};
    const double c1[2][3] = {{0.5, 1, 0.630930}, {0.5, 1, 1}};
    bool matched = false;
    for (const auto& a : c0)
        for (const auto& b : c1)
            matched = matched || (std::abs(draw.metrics.precision_at_k - (a[0] + b[0]) / 2) < 1e-9 &&
                                  std::abs(draw.metrics.recall_at_k - (a[1] + b[1]) / 2) < 1e-9 &&
                                  std::abs(draw.metrics.ndcg_at_k - (a[2] + b[2]) / 2) < 1e-6);
    CHECK(matched);

    const auto json = to_json(report);
    CHECK(json["ranking"]["k"] == 2);
    CHECK(json["ranking"]["relevance_threshold"] == 4.0);
    CHECK(json["ranking"]["modes"]["lower"]["precision_at_k"] == 0.75);
    CHECK(json["ranking"]["modes"].size() == 4);
    CHECK(json["pit_histogram"]["total"] == 5);
    CHECK(json["coverage_curve"].size() == 18);
    // The earlier keys are all still there.
    for (const char* key : {"rmse", "mae", "mean_log_predictive_density", "coverage", "rated", "unknown_users",
                            "unknown_items"})
        CHECK(json.contains(key));

    options.ranking = false;
    CHECK_FALSE(to_json(evaluate(PredictionEngine(post), test, options)).contains("ranking"));
    options.ranking = true;
    options.ranking_k = 0;
    CHECK_THROWS_AS(evaluate(PredictionEngine(post), test, options), OptionError);
    CHECK_THROWS_WITH(evaluate(PredictionEngine(post), test, options), Catch::Contains("--k"));
    options.ranking_k = 10;
    options.relevance_threshold = std::nan("");
    CHECK_THROWS_WITH(evaluate(PredictionEngine(post), test, options), Catch::Contains("--relevance-threshold"));
}
