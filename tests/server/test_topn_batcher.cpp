// Tests for the top-N batcher (server/topn_batcher.cpp): concurrent callers
// get exactly what the engine answers alone, whichever pass served them.
#include <catch2/catch.hpp>

#include <atomic>
#include <chrono>
#include <optional>
#include <memory>
#include <stdexcept>
#include <thread>
#include <vector>

#include "model/error.hpp"
#include "model/predict/predict.hpp"
#include "server/topn_batcher.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;
using credence::server::TopNBatcher;

namespace {

std::shared_ptr<const Posterior> simulated(const SimulatedPosteriorOptions& options) {
    return std::make_shared<const Posterior>(simulate_posterior(options));
}

// A small model (6 users, 400 products, rank 8, 12 samples of one chain)
// drawn with `seed`.
std::shared_ptr<const Posterior> small_model(uint64_t seed) {
    return simulated({.users = 6, .items = 400, .rank = 8, .samples = 12, .chains = 1, .seed = seed});
}

// The visit tests' set-up: a small model, its engine, and a one-lane batcher
// of up to 8 requests a pass whose collection window is 10 s, so that
// waiting for it even once would show. Built in place, never copied.
struct WindowedBatcher {
    std::shared_ptr<const Posterior> posterior;
    PredictionEngine engine;
    TopNBatcher batcher;
    explicit WindowedBatcher(uint64_t seed)
        : posterior(small_model(seed)), engine(posterior), batcher(1, 8, 10'000'000) {}
};

RecommendOptions options_for(uint32_t k) {
    RecommendOptions o;
    o.n = 1 + k % 12;
    o.rank_by = std::vector<RankBy>{RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}[k % 4];
    o.level = k % 3 == 0 ? 0.8 : 0.9;
    o.draw_seed = k;
    return o;
}

}  // namespace

TEST_CASE("concurrent callers get the engine's own answers, from the right engine") {
    // Two models served at once through one batcher with a single lane, so
    // callers queue behind each other and share passes; every answer must be
    // bit-identical to a direct call on the engine it asked.
    const auto post_a = simulated({.users = 12, .items = 900, .rank = 16, .samples = 20, .chains = 2, .seed = 41});
    const auto post_b = simulated({.users = 12, .items = 900, .rank = 16, .samples = 20, .chains = 2, .seed = 42});
    const PredictionEngine engine_a(post_a), engine_b(post_b);
    TopNBatcher batcher(1, 4);

    constexpr int threads = 8, per_thread = 12;
    std::atomic<int> mismatches{0}, answered{0};
    std::vector<std::thread> pool;
    for (int t = 0; t < threads; ++t)
        pool.emplace_back([&, t] {
            for (int r = 0; r < per_thread; ++r) {
                const uint32_t k = static_cast<uint32_t>(t * per_thread + r);
                const PredictionEngine& engine = k % 2 ? engine_a : engine_b;
                const uint32_t user = k % 12;
                const auto got = batcher.recommend(engine, user, options_for(k));
                if (got != engine.recommend(user, options_for(k))) ++mismatches;
                ++answered;
            }
        });
    for (auto& th : pool) th.join();
    CHECK(mismatches == 0);
    CHECK(answered == threads * per_thread);
    const auto stats = batcher.stats();
    INFO("passes " << stats.passes << ", largest batch " << stats.largest_batch);
    CHECK(stats.requests == threads * per_thread);
    CHECK(stats.passes >= 1);
    CHECK(stats.passes <= stats.requests);
    CHECK(stats.largest_batch >= 1);
    CHECK(stats.largest_batch <= 4);  // never more than max_batch per pass
}

TEST_CASE("a bad request fails alone and the others still get their answers") {
    const PredictionEngine engine(small_model(7));
    TopNBatcher batcher(1, 8);
    std::atomic<int> wrong{0};
    std::vector<std::thread> pool;
    for (int t = 0; t < 6; ++t)
        pool.emplace_back([&, t] {
            for (int r = 0; r < 10; ++r) {
                RecommendOptions o = options_for(static_cast<uint32_t>(t + r));
                if (t == 0 && r % 2 == 0) {
                    o.level = 1.0;  // outside (0, 1)
                    try {
                        batcher.recommend(engine, 1, o);
                        ++wrong;  // should have thrown
                    } catch (const OptionError&) {
                    }
                    continue;
                }
                if (t == 1 && r == 3) {
                    try {
                        batcher.recommend(engine, 6, o);  // beyond the model's 6 users
                        ++wrong;
                    } catch (const std::out_of_range&) {
                    }
                    continue;
                }
                if (batcher.recommend(engine, static_cast<uint32_t>(t), o) !=
                    engine.recommend(static_cast<uint32_t>(t), o))
                    ++wrong;
            }
        });
    for (auto& th : pool) th.join();
    CHECK(wrong == 0);
    CHECK(batcher.stats().requests == 60);
}

TEST_CASE("a batcher needs a batch size of at least one") {
    CHECK_THROWS_AS(TopNBatcher(1, 0), std::invalid_argument);
}

TEST_CASE("a lone visiting caller never waits for the collection window") {
    WindowedBatcher fixture(8);
    const PredictionEngine& engine = fixture.engine;
    TopNBatcher& batcher = fixture.batcher;
    const auto start = std::chrono::steady_clock::now();
    for (uint32_t r = 0; r < 10; ++r) {
        const TopNBatcher::Visit visit(batcher);
        CHECK(batcher.recommend(engine, r % 6, options_for(r)) == engine.recommend(r % 6, options_for(r)));
    }
    CHECK(std::chrono::steady_clock::now() - start < std::chrono::seconds(5));
    const auto stats = batcher.stats();
    CHECK(stats.windows == 0);
    CHECK(stats.passes == 10);
}

TEST_CASE("a pass waits for a visiting request that has not asked yet and serves both") {
    WindowedBatcher fixture(9);
    const PredictionEngine& engine = fixture.engine;
    TopNBatcher& batcher = fixture.batcher;
    // Both requests are inside the route before either asks; the second asks
    // 100 ms later. Whichever leads the pass waits for the other, so one pass
    // serves both, long before the window ends.
    std::optional<TopNBatcher::Visit> first_visit(std::in_place, batcher), second_visit(std::in_place, batcher);
    std::vector<Recommendation> first, second;
    const auto start = std::chrono::steady_clock::now();
    std::thread a([&] {
        first = batcher.recommend(engine, 1, options_for(1));
        first_visit.reset();
    });
    std::thread b([&] {
        std::this_thread::sleep_for(std::chrono::milliseconds(100));
        second = batcher.recommend(engine, 2, options_for(2));
        second_visit.reset();
    });
    a.join();
    b.join();
    CHECK(std::chrono::steady_clock::now() - start < std::chrono::seconds(5));
    CHECK(first == engine.recommend(1, options_for(1)));
    CHECK(second == engine.recommend(2, options_for(2)));
    const auto stats = batcher.stats();
    CHECK(stats.passes == 1);
    CHECK(stats.largest_batch == 2);
    CHECK(stats.windows == 1);
}

TEST_CASE("a visit that ends without asking ends the wait for it") {
    WindowedBatcher fixture(10);
    const PredictionEngine& engine = fixture.engine;
    TopNBatcher& batcher = fixture.batcher;
    std::optional<TopNBatcher::Visit> asking(std::in_place, batcher), leaving(std::in_place, batcher);
    const auto start = std::chrono::steady_clock::now();
    std::thread b([&] {
        std::this_thread::sleep_for(std::chrono::milliseconds(100));
        leaving.reset();  // e.g. a request refused before it asked for its list
    });
    CHECK(batcher.recommend(engine, 3, options_for(3)) == engine.recommend(3, options_for(3)));
    asking.reset();
    b.join();
    CHECK(std::chrono::steady_clock::now() - start < std::chrono::seconds(5));
    const auto stats = batcher.stats();
    CHECK(stats.passes == 1);
    CHECK(stats.windows == 1);
}
