// Tests for model/simulate: synthetic data follows its options and seed, and
// the holdout split partitions the ratings.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <set>
#include <tuple>

#include "model/simulate.hpp"

using namespace credence;

TEST_CASE("simulated ratings follow the model and repeat for a seed") {
    SimulationOptions o;
    o.users = 300;
    o.items = 200;
    o.rank = 3;
    o.density = 0.2;
    o.noise_sd = 0.7;
    o.bias_sd = 0.3;
    o.seed = 5;
    const SimulatedData d = simulate_ratings(o);
    const size_t n = d.ratings.size();
    // Pair count ~ Binomial(60000, 0.2): sd ~98; allow 5 sd.
    CHECK(std::abs(double(n) - 12000.0) < 5 * std::sqrt(60000 * 0.2 * 0.8));
    CHECK(std::is_sorted(d.ratings.ratings.begin(), d.ratings.ratings.end(),
                         [](auto& a, auto& b) { return std::tie(a.user, a.item) < std::tie(b.user, b.item); }));
    CHECK(d.ratings.users.name(17) == "customer-000017");
    // Residuals about the true mean estimate the noise sd: the sample variance
    // of n normals has sd sigma^2 sqrt(2/n); 5 sd tolerance.
    double ss = 0, lo = 1e9, hi = -1e9;
    for (const auto& r : d.ratings.ratings) {
        const double e = r.value - d.true_mean(r.user, r.item);
        ss += e * e;
        lo = std::min(lo, double(r.value));
        hi = std::max(hi, double(r.value));
    }
    CHECK(std::abs(ss / n - 0.49) < 5 * 0.49 * std::sqrt(2.0 / n));
    CHECK(d.ratings.scale.min == float(lo));
    CHECK(d.ratings.scale.max == float(hi));

    const SimulatedData again = simulate_ratings(o);
    REQUIRE(again.ratings.size() == n);
    for (size_t j = 0; j < n; ++j) CHECK(again.ratings.ratings[j].value == d.ratings.ratings[j].value);
    o.seed = 6;
    CHECK(simulate_ratings(o).ratings.ratings[0].value != d.ratings.ratings[0].value);
}

TEST_CASE("ratings_per_user gives exactly that many distinct items per user") {
    SimulationOptions o;
    o.users = 50;
    o.items = 40;
    o.ratings_per_user = 7;
    const SimulatedData d = simulate_ratings(o);
    CHECK(d.ratings.size() == 350);
    std::set<std::pair<uint32_t, uint32_t>> pairs;
    for (const auto& r : d.ratings.ratings) pairs.insert({r.user, r.item});
    CHECK(pairs.size() == 350);
    o.ratings_per_user = 41;
    CHECK_THROWS_AS(simulate_ratings(o), std::invalid_argument);
}

TEST_CASE("holdout split partitions the ratings and repeats for a seed") {
    SimulationOptions o;
    o.users = 100;
    o.items = 80;
    o.density = 0.3;
    const SimulatedData d = simulate_ratings(o);
    const HoldoutSplit s = split_holdout(d.ratings, 0.1, 42);
    const size_t n = d.ratings.size();
    CHECK(s.test.size() == size_t(std::llround(0.1 * n)));
    CHECK(s.train.size() + s.test.size() == n);
    CHECK(s.train.users.size() == d.ratings.users.size());
    std::set<std::pair<uint32_t, uint32_t>> seen;
    for (const auto& r : s.train.ratings) seen.insert({r.user, r.item});
    for (const auto& r : s.test) CHECK(seen.insert({r.user, r.item}).second);
    CHECK(seen.size() == n);
    const HoldoutSplit again = split_holdout(d.ratings, 0.1, 42);
    const HoldoutSplit other = split_holdout(d.ratings, 0.1, 43);
    bool same = true, differs = false;
    for (size_t j = 0; j < s.test.size(); ++j) {
        same = same && again.test[j].user == s.test[j].user && again.test[j].item == s.test[j].item;
        differs = differs || other.test[j].user != s.test[j].user || other.test[j].item != s.test[j].item;
    }
    CHECK(same);
    CHECK(differs);
    CHECK_THROWS_AS(split_holdout(d.ratings, 1.0, 1), std::invalid_argument);
}
