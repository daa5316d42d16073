// Tests for model/fit/warm_start.cpp: a new fit's chains start from an
// earlier fit's kept draws (known ids keep them, new ids start from the
// prior, dropped ids go), every old prediction is unchanged at the start,
// unsafe starts (another rank, bias setting or rating scale) are refused,
// and a warm-started converged run's kept draws pass the convergence checks.
#include <catch2/catch.hpp>

#include <cmath>
#include <functional>
#include <string>
#include <vector>

#include "model/error.hpp"
#include "model/fit/sampler.hpp"
#include "model/fit/warm_start.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

// The ratings of `all` whose customer and product `keep` accepts, ids
// interned afresh (in `all`'s order, so the result stays sorted).
RatingSet subset(const RatingSet& all, const std::function<bool(uint32_t user, uint32_t item)>& keep) {
    RatingSet out;
    out.scale = all.scale;
    for (const auto& r : all.ratings) {
        if (!keep(r.user, r.item)) continue;
        out.ratings.push_back(Rating{out.users.intern(all.users.name(r.user)), out.items.intern(all.items.name(r.item)),
                                     r.value});
    }
    return out;
}

// 60 customers x 30 products drawn from the model (rank 3, with biases).
const SimulatedData& shop() {
    static const SimulatedData data = simulate_ratings(SimulationOptions{
        .users = 60, .items = 30, .rank = 3, .density = 0.35, .noise_sd = 0.5, .bias_sd = 0.3, .seed = 41});
    return data;
}

// Last night's export: customers 0-49 and products 0-24.
RatingSet old_export() {
    return subset(shop().ratings, [](uint32_t u, uint32_t i) { return u < 50 && i < 25; });
}

// Tonight's: customers 0-9 and products 0-1 are gone; customers 50-59 and
// products 25-29 are new.
RatingSet new_export() {
    return subset(shop().ratings, [](uint32_t u, uint32_t i) { return u >= 10 && i >= 2; });
}

FitOptions short_run() {
    return FitOptions{.rank = 3, .run_length = RunLength::fixed, .samples = 4, .burn_in = 30, .thin = 1, .chains = 2,
                      .seed = 17, .threads = 1};
}

const Posterior& old_posterior() {
    static const Posterior p = fit_bpmf(old_export(), short_run()).posterior;
    return p;
}

}  // namespace

TEST_CASE("a warm start keeps the draws of known ids, starts new ids from the prior and drops the rest") {
    const Posterior& old = old_posterior();
    const RatingSet train = new_export();
    const FitOptions options = short_run();
    const WarmStart w = warm_start_from(old, "last-night.posterior", train, options);

    REQUIRE(w.states.size() == options.chains);
    CHECK(w.record["kind"] == "warm");
    CHECK(w.record["from"] == "last-night.posterior");
    CHECK(w.record["customers_kept"] == 40);
    CHECK(w.record["customers_new"] == 10);
    CHECK(w.record["customers_dropped"] == 10);
    CHECK(w.record["products_kept"] == 23);
    CHECK(w.record["products_new"] == 5);
    CHECK(w.record["products_dropped"] == 2);

    const uint32_t K = old.rank;
    const IdMap old_users = IdMap::from_names(old.user_ids), old_items = IdMap::from_names(old.item_ids);
    for (uint32_t c = 0; c < options.chains; ++c) {
        INFO("chain " << c);
        const GibbsState& st = w.states[c];
        const uint32_t s = w.record["from_samples"][c].get<uint32_t>();
        REQUIRE(st.user_factors.size() == train.users.size() * K);
        REQUIRE(st.item_factors.size() == train.items.size() * K);
        // Known ids: the old draw's factors, bit for bit; and the old draw's
        // prediction for every known pair, with g's change moved into the
        // product biases (float arithmetic: 1e-4 on ratings of a few units).
        const double g_new = train.mean();
        uint32_t known_pairs = 0;
        for (uint32_t u = 0; u < train.users.size(); ++u) {
            const auto ou = old_users.find(train.users.name(u));
            if (!ou) continue;
            for (uint32_t a = 0; a < K; ++a) CHECK(st.user_factors[u * K + a] == old.user_factor(s, *ou)[a]);
            CHECK(st.user_bias[u] == old.user_bias_of(s, *ou));
            for (uint32_t i = 0; i < train.items.size(); i += 3) {
                const auto oi = old_items.find(train.items.name(i));
                if (!oi) continue;
                double start = g_new + st.user_bias[u] + st.item_bias[i];
                for (uint32_t a = 0; a < K; ++a) start += double(st.user_factors[u * K + a]) * st.item_factors[i * K + a];
                CHECK(start == Approx(old.sample_prediction(s, *ou, *oi)).margin(1e-4));
                ++known_pairs;
            }
        }
        CHECK(known_pairs > 100);
        // New ids: drawn from the prior, so finite and not all alike.
        for (uint32_t u = 0; u < train.users.size(); ++u) {
            if (old_users.find(train.users.name(u))) continue;
            for (uint32_t a = 0; a < K; ++a) CHECK(std::isfinite(st.user_factors[u * K + a]));
        }
    }
    // Two chains start from two different draws.
    CHECK(w.record["from_samples"][0] != w.record["from_samples"][1]);
    CHECK(w.states[0].user_factors != w.states[1].user_factors);
}

TEST_CASE("a warm start is refused when the rank, the bias setting or the rating scale changed") {
    const Posterior& old = old_posterior();
    const RatingSet train = new_export();

    FitOptions other_rank = short_run();
    other_rank.rank = 4;
    CHECK_THROWS_AS(warm_start_from(old, "old.posterior", train, other_rank), OptionError);
    CHECK_THROWS_WITH(warm_start_from(old, "old.posterior", train, other_rank), Catch::Contains("rank"));

    FitOptions no_biases = short_run();
    no_biases.biases = false;
    CHECK_THROWS_AS(warm_start_from(old, "old.posterior", train, no_biases), OptionError);

    RatingSet rescaled = train;
    rescaled.scale = RatingScale{1.0f, 10.0f, true};
    CHECK_THROWS_AS(warm_start_from(old, "old.posterior", rescaled, short_run()), DataError);
    CHECK_THROWS_WITH(warm_start_from(old, "old.posterior", rescaled, short_run()), Catch::Contains("--scale"));

    // Mostly customers the old model never saw: the start would be prior draws.
    const RatingSet strangers = subset(shop().ratings, [](uint32_t u, uint32_t) { return u >= 40; });
    CHECK_THROWS_AS(warm_start_from(old, "old.posterior", strangers, short_run()), DataError);
}

TEST_CASE("a warm-started run from a converged fit converges, and its kept draws pass the convergence checks",
          "[slow]") {
    const FitOptions converged{.rank = 3, .samples = 50, .chains = 2, .seed = 29, .threads = 2};
    const FitResult cold = fit_bpmf(old_export(), converged);
    REQUIRE(cold.convergence.verdict == "converged");

    Posterior old = cold.posterior;
    const RatingSet train = new_export();
    const WarmStart w = warm_start_from(old, "cold.posterior", train, converged);
    CHECK(w.burn_in == kWarmStartBurnIn);
    const FitResult warm = fit_bpmf(train, converged, nullptr, {}, &w);
    // The verdict is the same R-hat and ESS check (model/fit/convergence_summary.hpp)
    // every fit passes, over the kept window of the warm run.
    CHECK(warm.convergence.verdict == "converged");
    CHECK(warm.stop_reason == StopReason::converged);
    CHECK(warm.posterior.num_users == train.users.size());
    CHECK(warm.posterior.num_items == train.items.size());
}
