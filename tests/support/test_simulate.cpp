// Tests for model/simulate: synthetic data follows its options and seed, and
// the holdout split partitions the ratings; simulated posteriors are valid and
// follow their options.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <set>
#include <stdexcept>
#include <tuple>

#include "tests/support/simulate.hpp"

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

TEST_CASE("simulated posterior is valid, repeats for a seed and honours its options") {
    SimulatedPosteriorOptions o{.users = 200, .items = 100, .rank = 3, .samples = 6, .chains = 3, .seed = 5};
    o.duplicate_items = 4;
    o.id_digits = 5;
    const Posterior a = simulate_posterior(o);
    CHECK_NOTHROW(a.validate());
    const Posterior b = simulate_posterior(o);
    CHECK(a.user_factors == b.user_factors);
    CHECK(a.item_bias == b.item_bias);
    CHECK(a.user_lambda == b.user_lambda);
    CHECK(a.rated_items == b.rated_items);
    o.seed = 6;
    CHECK(simulate_posterior(o).item_factors != a.item_factors);

    CHECK(a.user_ids[7] == "cust-00007");
    CHECK(a.item_ids[42] == "sku-00042");
    CHECK(a.sample_chain == std::vector<uint32_t>{0, 0, 1, 1, 2, 2});
    // The last four items copy items 0..3 exactly in every sample.
    for (uint32_t s = 0; s < a.num_samples; ++s)
        for (uint32_t j = 0; j < 4; ++j) {
            const auto from = a.item_factor(s, j), to = a.item_factor(s, 96 + j);
            CHECK(std::equal(from.begin(), from.end(), to.begin()));
            CHECK(a.item_bias_of(s, j) == a.item_bias_of(s, 96 + j));
        }
    // Each of the 20,000 pairs is rated with probability 0.2: the observed
    // fraction has binomial sd sqrt(0.2 * 0.8 / 20000) = 0.0028; tolerance 4 sd.
    CHECK(double(a.rated_items.size()) / 20000.0 == Approx(0.2).margin(0.0113));
}

TEST_CASE("simulated posterior: zero values, goods ids and bad options") {
    SimulatedPosteriorOptions o{.users = 3, .items = 7, .rank = 2, .samples = 4, .chains = 2, .biases = false};
    o.zero_values = true;
    o.id_style = SimulatedIdStyle::goods;
    const Posterior p = simulate_posterior(o);
    CHECK(std::all_of(p.item_factors.begin(), p.item_factors.end(), [](float v) { return v == 0.0f; }));
    CHECK(p.noise_precision == std::vector<float>(4, 1.0f));
    CHECK(p.user_lambda[0] == 1.0f);
    CHECK(p.user_lambda[1] == 0.0f);
    CHECK(p.rated_items.empty());
    CHECK(p.user_bias.empty());
    CHECK(p.user_ids[0] == "customer-1000");
    CHECK(p.item_ids[5] == "\xc3\xb6ko-mug-5");

    SimulatedPosteriorOptions bad{.items = 10};
    bad.duplicate_items = 6;
    CHECK_THROWS_AS(simulate_posterior(bad), std::invalid_argument);
    bad = {.samples = 2, .chains = 3};
    CHECK_THROWS_AS(simulate_posterior(bad), std::invalid_argument);
    bad = {};
    bad.rated_fraction = 1.5;
    CHECK_THROWS_AS(simulate_posterior(bad), std::invalid_argument);
}
