// Tests for the screening pass's float kernels (model/predict/screening_kernels):
// at every CPU level this machine runs, each float sum is within its
// rounding bound of a double reference, and the engine's answers are the
// same bits at every level and for any number of threads in the pass (also
// where a level reads the half-precision copy of the item factors).
#include <catch2/catch.hpp>

#include <cmath>
#include <cstdint>
#include <memory>
#include <sstream>
#include <string>
#include <span>
#include <vector>

#include "model/math/cpu_level.hpp"
#include "model/math/half_float.hpp"
#include "model/math/random.hpp"
#include "model/predict/predict.hpp"
#include "model/predict/screening_kernels.hpp"
#include "tests/support/python_reference.hpp"
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

// A grouped tile over `slices` (kGroupSamples of them, items x rank each)
// for `viewers` viewers with random factors ([viewer * samples + g]).
struct RandomViewersTile {
    std::vector<std::vector<float>> factors;
    std::vector<const float*> viewer_ptrs;
    screening_kernels::GroupedTile tile;

    RandomViewersTile(Rng& rng, const std::vector<const float*>& slices, uint32_t viewers, uint32_t items,
                      uint32_t rank)
        : factors(size_t(viewers) * screening_kernels::kGroupSamples) {
        for (auto& f : factors) {
            f = random_floats(rng, rank);
            viewer_ptrs.push_back(f.data());
        }
        tile.slices = slices.data();
        tile.viewers = viewer_ptrs.data();
        tile.samples = screening_kernels::kGroupSamples;
        tile.items = items;
        tile.rank = rank;
        tile.count = viewers;
    }
};

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
            std::vector<std::vector<float>> slices(samples);
            std::vector<const float*> slice_ptrs;
            for (auto& s : slices) {
                s = random_floats(rng, size_t(items) * rank);
                slice_ptrs.push_back(s.data());
            }
            const RandomViewersTile fixture(rng, slice_ptrs, viewers, items, rank);
            const screening_kernels::GroupedTile& tile = fixture.tile;
            const auto& factors = fixture.factors;
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
    // With the half copy, as the server keeps it: the baseline's answers
    // (which read floats) are the reference for the levels that read halves.
    const PredictionEngine engine(posterior, EngineOptions{.half_precision_screening = true});
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

TEST_CASE("half conversions round to nearest even as numpy's float16 does, and widen exactly") {
    // Every finite half survives the round trip (float_from_half is exact).
    for (uint32_t h = 0; h < 0x10000; ++h) {
        if (((h >> 10) & 0x1f) == 0x1f) continue;  // infinities and NaNs: never in the screening copy
        INFO("half " << h);
        REQUIRE(half_from_float(float_from_half(static_cast<uint16_t>(h))) == h);
    }
    // Rounding against an outside reference: numpy's float32 -> float16
    // conversion (round to nearest, ties to even). The values: ties and
    // near-ties at several scales, the subnormal range and its edge, the top
    // of the range, and random normals.
    std::vector<float> xs = {0.0f, -0.0f, 1.0f, 65504.0f, -65504.0f, 65519.0f, 0x1p-14f, 0x1p-15f, 0x1p-24f,
                             0x1p-25f, 0x1.8p-25f, 0x1.004p-14f, 1.0f + 0x1p-11f, 1.0f + 0x3p-11f,
                             1.0f + 0x1p-11f + 0x1p-23f, 2047.0f, 2049.0f, 4097.0f, 0x1.ffcp-15f};
    Rng rng(41);
    for (int k = 0; k < 2000; ++k) xs.push_back(static_cast<float>(rng.normal() * std::exp2(rng.normal() * 6.0)));
    std::ostringstream list;  // hexadecimal: exact, and keeps the sign of -0
    for (float x : xs) list << std::hexfloat << double(x) << " ";
    const std::string out = testing::run_python_inline(
        "import numpy as np; v = np.array([float.fromhex(t) for t in \"" + list.str() +
        "\".split()], dtype=np.float32); print(\" \".join(str(int(b)) for b in v.astype(np.float16).view(np.uint16)))");
    if (out.empty()) {
        WARN("NOTICE: /usr/bin/python3 with numpy not found; skipping the float16 cross-check");
        return;
    }
    std::istringstream in(out);
    for (float x : xs) {
        uint32_t expected = 0;
        REQUIRE(in >> expected);
        INFO("x = " << x);
        CHECK(half_from_float(x) == expected);
    }
}

TEST_CASE("grouped sums read from half slices are the sums of their widened floats, bit for bit") {
    // The levels that read halves widen each row in registers and then do
    // the multiply-adds of the float kernel: so the same sums as the float
    // kernel given float_from_half of every value.
    Rng rng(8);
    for (const uint32_t rank : {8u, 16u, 32u}) {
        for (const uint32_t viewers : {1u, 2u, 3u}) {
            const uint32_t samples = screening_kernels::kGroupSamples, items = 45;
            std::vector<std::vector<uint16_t>> halves(samples);
            std::vector<std::vector<float>> widened(samples);
            std::vector<const uint16_t*> half_ptrs;
            std::vector<const float*> widened_ptrs;
            for (uint32_t g = 0; g < samples; ++g) {
                for (float x : random_floats(rng, size_t(items) * rank)) {
                    halves[g].push_back(half_from_float(x));
                    widened[g].push_back(float_from_half(halves[g].back()));
                }
                half_ptrs.push_back(halves[g].data());
                widened_ptrs.push_back(widened[g].data());
            }
            RandomViewersTile fixture(rng, widened_ptrs, viewers, items, rank);
            screening_kernels::GroupedTile& tile = fixture.tile;
            for (CpuLevel level : supported_cpu_levels()) {
                const auto& table = screening_kernels::table_for(level);
                if (!table.reads_halves(viewers, rank)) continue;
                std::vector<std::vector<double>> from_floats(viewers, std::vector<double>(items, 0.5)),
                    from_halves = from_floats;
                std::vector<double*> float_sums, half_sums;
                for (uint32_t v = 0; v < viewers; ++v) {
                    float_sums.push_back(from_floats[v].data());
                    half_sums.push_back(from_halves[v].data());
                }
                tile.half_slices = nullptr;
                table.grouped_sums(tile, float_sums.data());
                tile.half_slices = half_ptrs.data();
                table.grouped_sums(tile, half_sums.data());
                INFO(cpu_level_name(level) << " rank " << rank << " viewers " << viewers);
                CHECK(from_halves == from_floats);
            }
        }
    }
    // Where the CPU has F16C, the few-viewer shapes read halves; the
    // baseline never does.
    CHECK_FALSE(screening_kernels::table_for(CpuLevel::baseline).reads_halves(1, 16));
}
