// The screening pass's float dot products (model/predict/screening.hpp),
// compiled once per x86-64 level (model/math/cpu_level.hpp) and called
// through the table of the active level. Internal to model/predict.
//
// Levels may differ in the last bits here, never in an answer: every float
// sum below is a sum of n products in some order, so within gamma_n times
// the sum of the products' magnitudes of the exact value whatever the order
// and whether multiply-adds are fused (Higham, Accuracy and Stability of
// Numerical Algorithms, 2nd ed., section 3.1), which is the slack the
// screening pass already proves its pruning with; the exact scores that
// decide an answer come from the double reference path, the same at every
// level. tests/model/predict/test_screening_kernels.cpp compares the levels.
#pragma once
#include <cstddef>
#include <cstdint>

namespace credence {
enum class CpuLevel : int;  // model/math/cpu_level.hpp
}

namespace credence::screening_kernels {

// Samples summed in float before a flush to double, and items per tile.
inline constexpr uint32_t kGroupSamples = 8;
inline constexpr uint32_t kTileItems = 256;

// One tile of the catalogue under a group of samples, for several viewers.
struct GroupedTile {
    const float* const* slices = nullptr;  // [samples]: sample s's factors of the tile's items, [items][rank]
    const float* const* viewers = nullptr; // [viewer * samples + g]: viewer's factor under the g-th sample, [rank]
    uint32_t samples = 0;                  // <= kGroupSamples
    uint32_t items = 0;                    // <= kTileItems
    uint32_t rank = 0;
    uint32_t count = 0;                    // viewers
    // [samples]: the same slices in IEEE half precision, or null. When set,
    // grouped_sums reads these instead of `slices`; only for the shapes
    // Table::reads_halves accepts.
    const uint16_t* const* half_slices = nullptr;
};

struct Table {
    const char* level;  // cpu_level_name of the level it was compiled for

    // out[j] = the float dot product of vectors[j * rank ..] and u, j < count.
    void (*dots)(const float* vectors, const float* u, uint32_t rank, size_t count, float* out);

    // sums[v][j] += the float sum, over the group's samples and the rank,
    // of slice[j] . viewer v's factor, widened to double; j < items. Each
    // flushed value is a float sum of samples * rank products.
    void (*grouped_sums)(const GroupedTile& tile, double* const* sums);

    // Whether grouped_sums can read half slices (GroupedTile::half_slices)
    // for `viewers` viewers at `rank`: the levels with F16C, for the few-
    // viewer kernel that widens each row in registers as it multiplies.
    bool (*reads_halves)(uint32_t viewers, uint32_t rank);
};

extern const Table table_baseline;
extern const Table table_v3;
extern const Table table_v4;

// The table for `level`: needs a level this build compiled and this CPU
// runs; std::invalid_argument otherwise.
const Table& table_for(CpuLevel level);

}  // namespace credence::screening_kernels
