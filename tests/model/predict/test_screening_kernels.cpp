// Tests for the screening pass's float kernels (model/predict/screening_kernels):
// at every CPU level this machine runs, each float sum is within its
// rounding bound of a double reference, and the engine's answers are the
// same bits at every level and for any number of threads in the pass.
#include <catch2/catch.hpp>

#include <cmath>
#include <memory>
#include <span>
#include <vector>

#include "model/math/cpu_level.hpp"
#include "model/math/random.hpp"
#include "model/predict/predict.hpp"
#include "model/predict/screening_kernels.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

constexpr double kFloatUnit = 0x1.0p-24;

// Higham, Accuracy and Stability of Numerical Algorithms (2nd ed.), section
// 3.1: a sum of n float products, in any order and fused or not, is within
// gamma_n times the sum of the products' magnitudes.
double gamma_n(double n) { return n * kFloatUnit / (1.0 - n * kFloatUnit); }

std::vector<float> random_floats(Rng& rng, size_t n) {
    std::vector<float> out(n);
    for (float& x : out) x = static_cast<float>(rng.normal());
    return out;
}

struct LevelGuard {
    CpuLevel saved = active_cpu_level();
    ~LevelGuard() { set_cpu_level(saved); }
};

}  // namespace

TEST_CASE("every CPU level's float dot products are within the rounding bound of a double reference") {
    Rng rng(5);
    for (const uint32_t rank : {3u, 8u, 16u, 17u, 32u, 40u}) {
        const size_t count = 37;
        const auto vectors = random_floats(rng, count * rank), u = random_floats(rng, rank);
        for (CpuLevel level : supported_cpu_levels()) {
            std::vector<float> out(count);
            screening_kernels::table_for(level).dots(vectors.data(), u.data(), rank, count, out.data());
            for (size_t j = 0; j < count; ++j) {
                double exact = 0.0, magnitude = 0.0;  // products of floats are exact in double
                for (uint32_t k = 0; k < rank; ++k) {
                    exact += double(vectors[j * rank + k]) * double(u[k]);
                    magnitude += std::abs(double(vectors[j * rank + k]) * double(u[k]));
                }
                INFO(cpu_level_name(level) << " rank " << rank << " item " << j);
                // The double reference's own error (rank terms, 2^-53 each) is far below this.
                CHECK(std::abs(double(out[j]) - exact) <= gamma_n(rank) * magnitude + 1e-15 * magnitude);
            }
        }
    }
}

TEST_CASE("every CPU level's grouped sums are within the rounding bound of a double reference, for any viewer count") {
    Rng rng(6);
    for (const uint32_t rank : {5u, 8u, 16u, 32u}) {
        for (const uint32_t viewers : {1u, 2u, 3u, 5u, 8u, 17u}) {  // 4-8: the lane-pair kernel at x86-64-v4
            const uint32_t samples = screening_kernels::kGroupSamples, items = 45;
            std::vector<std::vector<float>> slices(samples), factors(viewers * samples);
            std::vector<const float*> slice_ptrs, viewer_ptrs;
            for (auto& s : slices) {
                s = random_floats(rng, size_t(items) * rank);
                slice_ptrs.push_back(s.data());
            }
            for (auto& f : factors) {
                f = random_floats(rng, rank);
                viewer_ptrs.push_back(f.data());
            }
            screening_kernels::GroupedTile tile;
            tile.slices = slice_ptrs.data();
            tile.viewers = viewer_ptrs.data();
            tile.samples = samples;
            tile.items = items;
            tile.rank = rank;
            tile.count = viewers;
            for (CpuLevel level : supported_cpu_levels()) {
                std::vector<std::vector<double>> sums(viewers, std::vector<double>(items, 0.25));
                std::vector<double*> sum_ptrs;
                for (auto& s : sums) sum_ptrs.push_back(s.data());
                screening_kernels::table_for(level).grouped_sums(tile, sum_ptrs.data());
                for (uint32_t v = 0; v < viewers; ++v)
                    for (uint32_t j = 0; j < items; ++j) {
                        double exact = 0.25, magnitude = 0.0;
                        for (uint32_t g = 0; g < samples; ++g)
                            for (uint32_t k = 0; k < rank; ++k) {
                                const double product = double(slices[g][size_t(j) * rank + k]) * double(factors[v * samples + g][k]);
                                exact += product;
                                magnitude += std::abs(product);
                            }
                        INFO(cpu_level_name(level) << " rank " << rank << " viewers " << viewers << " item " << j);
                        // One float sum of samples * rank products, then one double add.
                        CHECK(std::abs(sums[v][j] - exact) <=
                              gamma_n(double(samples) * rank) * magnitude + 1e-15 * (magnitude + 0.25));
                    }
            }
        }
    }
}

TEST_CASE("recommendations are the same bits at every CPU level and for any number of threads in the pass") {
    const LevelGuard guard;
    SimulatedPosteriorOptions spec;
    spec.users = 30;
    spec.items = 1500;  // several tiles
    spec.rank = 16;
    spec.samples = 21;  // a partial group of samples at the end
    spec.seed = 99;
    spec.duplicate_items = 4;  // exact ties
    const auto posterior = std::make_shared<const Posterior>(simulate_posterior(spec));
    const PredictionEngine engine(posterior);
    std::vector<RecommendRequest> requests;
    for (uint32_t k = 0; k < 24; ++k) {
        RecommendRequest r;
        r.user = k % spec.users;
        r.options.n = 1 + k % 12;
        r.options.rank_by = std::vector<RankBy>{RankBy::mean, RankBy::mean, RankBy::lower, RankBy::upper}[k % 4];
        requests.push_back(r);
    }
    set_cpu_level(CpuLevel::baseline);
    std::vector<std::vector<Recommendation>> reference;
    for (const auto& r : requests) reference.push_back(engine.recommend(r.user, r.options));
    for (CpuLevel level : supported_cpu_levels()) {
        set_cpu_level(level);
        for (int threads : {1, 2, 3}) {
            INFO(cpu_level_name(level) << ", " << threads << " thread(s)");
            const auto batched = engine.recommend_batch(requests, threads);
            REQUIRE(batched.size() == requests.size());
            for (size_t k = 0; k < requests.size(); ++k) {
                REQUIRE_FALSE(batched[k].error);
                CHECK(batched[k].items == reference[k]);
            }
            const std::vector<RecommendRequest> one{requests[0]};
            CHECK(engine.recommend_batch(one, threads)[0].items == reference[0]);
            // Eight, five and four requests: their shared pass takes the few-viewer kernels.
            for (const size_t count : {8u, 5u, 4u}) {
                INFO(count << " requests");
                const std::span<const RecommendRequest> first(requests.data(), count);
                const auto few = engine.recommend_batch(first, threads);
                for (size_t k = 0; k < count; ++k) CHECK(few[k].items == reference[k]);
            }
        }
    }
}
