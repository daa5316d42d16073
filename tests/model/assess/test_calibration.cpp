// Tests for model/calibration: PIT histogram, its chi-square statistic and
// the coverage curve, on predictive distributions whose truth is known.
#include <catch2/catch.hpp>

#include <cmath>
#include <stdexcept>
#include <vector>

#include "model/assess/calibration.hpp"
#include "model/math/standard_normal.hpp"
#include "model/math/random.hpp"

using namespace credence;

namespace {

// Pairs whose predictive is an equal-weight mixture of 5 normals
// N(m_s, 1/tau_s) (the shape the prediction engine uses). The rating is drawn
// from a mixture whose sds are `truth_sd_factor` times the predictive's, so a
// factor of 1 means the predictive is the true distribution.
struct Pair {
    std::vector<double> m, sd;
    double y;
};

std::vector<Pair> make_pairs(size_t count, double truth_sd_factor, uint64_t seed) {
    Rng rng(seed);
    std::vector<Pair> pairs(count);
    for (auto& p : pairs) {
        const double centre = 3.0 + rng.normal();
        for (int s = 0; s < 5; ++s) {
            p.m.push_back(centre + 0.3 * rng.normal());
            p.sd.push_back(0.5 + rng.uniform());
        }
        const auto s = rng.below(5);
        p.y = p.m[s] + truth_sd_factor * p.sd[s] * rng.normal();
    }
    return pairs;
}

double mixture_cdf(const Pair& p, double x) {
    double f = 0;
    for (size_t s = 0; s < p.m.size(); ++s) f += normal_cdf((x - p.m[s]) / p.sd[s]);
    return f / static_cast<double>(p.m.size());
}

std::vector<double> pits(const std::vector<Pair>& pairs) {
    std::vector<double> out;
    for (const auto& p : pairs) out.push_back(mixture_cdf(p, p.y));
    return out;
}

}  // namespace

TEST_CASE("default levels are 0.10 to 0.95 in steps of 0.05, then 0.99") {
    const auto levels = default_coverage_levels();
    REQUIRE(levels.size() == 19);
    CHECK(levels.front() == Approx(0.10));
    CHECK(levels[1] == Approx(0.15));
    CHECK(levels[17] == Approx(0.95));
    CHECK(levels.back() == Approx(0.99));
}

TEST_CASE("PIT histogram bins by hand") {
    // Values 0, 0.05 -> bin 0; 0.1 -> bin 1; 0.55 -> bin 5; 0.999 and 1.0 -> bin 9
    // (the last bin is closed). n = 6, expected 0.6 per bin:
    // counts {2, 1, 0, 0, 0, 1, 0, 0, 0, 2}: two bins of 2, two of 1, six of 0.
    // chi2 = [2 (2-.6)^2 + 2 (1-.6)^2 + 6 (0-.6)^2] / .6 = [3.92 + 0.32 + 2.16] / .6 = 10.6667.
    const std::vector<double> v = {0.0, 0.05, 0.1, 0.55, 0.999, 1.0};
    const auto h = pit_histogram(v, 10);
    CHECK(h.counts == std::vector<uint64_t>{2, 1, 0, 0, 0, 1, 0, 0, 0, 2});
    CHECK(h.total == 6);
    CHECK(h.degrees_of_freedom == 9);
    CHECK(h.chi_square == Approx(10.6666667));
    const auto j = to_json(h);
    CHECK(j["counts"][9] == 2);
}

TEST_CASE("PIT of draws from the true predictive is uniform") {
    // 20,000 pairs, 10 bins. Under uniformity the Pearson statistic is
    // chi-square with 9 df; its 0.999 quantile is 27.877 (scipy.stats.chi2.ppf;
    // also in the chi-square table of the NIST/SEMATECH e-Handbook of
    // Statistical Methods, 1.3.6.7.4). Fixed seed.
    const auto p = pits(make_pairs(20000, 1.0, 42));
    const auto h = pit_histogram(p, 10);
    CHECK(h.total == 20000);
    CHECK(h.chi_square < 27.877);
    // Coverage at every level within 4 binomial standard errors of nominal
    // (at most ~0.0035 here); 19 checks, each failing with prob ~6e-5.
    for (const auto& point : coverage_from_pit(p, default_coverage_levels())) {
        INFO("level " << point.level << " coverage " << point.coverage);
        CHECK(std::abs(point.coverage - point.level) < 4 * point.standard_error);
    }
}

TEST_CASE("an overconfident predictive is caught by both PIT and coverage") {
    // Truth twice as wide as the predictive (single normal, sd 1 vs truth 2):
    // the central 50% interval m +- 0.6745 sd covers P(|Z| < 0.6745/2) =
    // 2 Phi(0.33724) - 1 = 0.26407, and the 90% interval covers
    // 2 Phi(1.64485/2) - 1 = 0.58917 (normal CDF; scipy.stats.norm).
    Rng rng(7);
    const size_t n = 20000;
    std::vector<double> pit;
    std::vector<bool> in50, in90;
    const double z75 = normal_quantile(0.75), z95 = normal_quantile(0.95);
    for (size_t j = 0; j < n; ++j) {
        const double m = 3.0 + rng.normal();
        const double y = m + 2.0 * rng.normal();
        pit.push_back(normal_cdf(y - m));
        in50.push_back(std::abs(y - m) <= z75);
        in90.push_back(std::abs(y - m) <= z95);
    }
    // U-shaped histogram: far beyond the 0.999 quantile 27.877.
    CHECK(pit_histogram(pit).chi_square > 1000);
    // Binomial sd of an observed share near p with n = 20,000 is
    // sqrt(p (1-p) / n) <= 0.0036; tolerance 4 sd = 0.015.
    const auto c50 = coverage_from_membership(0.5, in50);
    const auto c90 = coverage_from_membership(0.9, in90);
    CHECK(c50.coverage == Approx(0.26407).margin(0.015));
    CHECK(c90.coverage == Approx(0.58917).margin(0.015));
    // The PIT route gives the same events for a continuous predictive.
    const double levels[] = {0.5, 0.9};
    const auto curve = coverage_from_pit(pit, levels);
    CHECK(curve[0].inside == c50.inside);
    CHECK(curve[1].inside == c90.inside);
}

TEST_CASE("calibration inputs out of range are rejected") {
    const std::vector<double> bad = {0.2, 1.2};
    const std::vector<double> nan = {std::nan("")};
    const std::vector<double> ok = {0.2, 0.7};
    CHECK_THROWS_AS(pit_histogram(bad), std::invalid_argument);
    CHECK_THROWS_AS(pit_histogram(nan), std::invalid_argument);
    CHECK_THROWS_AS(pit_histogram(ok, 0), std::invalid_argument);
    const double level_one[] = {1.0};
    CHECK_THROWS_AS(coverage_from_pit(ok, level_one), std::invalid_argument);
    CHECK_THROWS_AS(coverage_from_membership(0.0, {true}), std::invalid_argument);
    // No pairs: the figures are undefined, written as null.
    const auto empty = coverage_from_membership(0.5, {});
    CHECK(std::isnan(empty.coverage));
    CHECK(to_json(std::vector<CoveragePoint>{empty})[0]["coverage"].is_null());
}
