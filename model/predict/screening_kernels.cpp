#include "model/predict/screening_kernels.hpp"

// Compiled once per level (CMakeLists.txt: CREDENCE_KERNEL_LEVEL 0, 1, 2 with
// -march=x86-64, x86-64-v3, x86-64-v4). Everything here has internal
// linkage and the builds above the baseline include no library header with
// inline functions, so no out-of-line copy built for one level can be linked
// into another's callers (the kernel_objects_share_no_code test checks it).
// The per-level frame (the level, the table's name, table_for in the
// baseline build alone): model/math/kernel_level.hpp.

#include "model/math/kernel_level.hpp"

namespace credence::screening_kernels {

namespace {

#if CREDENCE_KERNEL_LEVEL == 2
constexpr int kLanes = 16;  // floats per zmm
#elif CREDENCE_KERNEL_LEVEL == 1
constexpr int kLanes = 8;
#else
constexpr int kLanes = 4;
#endif

typedef float Vec __attribute__((vector_size(kLanes * sizeof(float)), __may_alias__, __aligned__(4)));

CREDENCE_INLINE Vec load(const float* p) { return *reinterpret_cast<const Vec*>(p); }
CREDENCE_INLINE void store(float* p, Vec v) { *reinterpret_cast<Vec*>(p) = v; }

CREDENCE_INLINE Vec splat(float x) {
#if CREDENCE_KERNEL_LEVEL == 2
    return reinterpret_cast<Vec>(_mm512_set1_ps(x));
#elif CREDENCE_KERNEL_LEVEL == 1
    return reinterpret_cast<Vec>(_mm256_set1_ps(x));
#else
    return Vec{x, x, x, x};
#endif
}

// c + a b, fused where the level has it (the rounding bound allows either).
CREDENCE_INLINE Vec multiply_add(Vec a, Vec b, Vec c) {
#if CREDENCE_KERNEL_LEVEL == 2
    return reinterpret_cast<Vec>(_mm512_fmadd_ps(reinterpret_cast<__m512>(a), reinterpret_cast<__m512>(b),
                                                 reinterpret_cast<__m512>(c)));
#elif CREDENCE_KERNEL_LEVEL == 1
    return reinterpret_cast<Vec>(_mm256_fmadd_ps(reinterpret_cast<__m256>(a), reinterpret_cast<__m256>(b),
                                                 reinterpret_cast<__m256>(c)));
#else
    return a * b + c;
#endif
}

// The sum of a vector's lanes (a fixed pairwise tree).
CREDENCE_INLINE float lane_sum(Vec v) {
    float t[kLanes];
    store(t, v);
    for (int width = kLanes / 2; width > 0; width /= 2)
        for (int i = 0; i < width; ++i) t[i] = t[i] + t[i + width];
    return t[0];
}

// Bytes ahead in a sample's slice at which the grouped kernels ask for the
// item factors they will need next. A slice is a few 4 KiB pages read in
// order, and the hardware prefetchers stop at every page boundary; a
// software prefetch does not, so the reading keeps up with the bandwidth.
// About 1 KiB per stream keeps the group's 8 streams' worth of memory
// latency in flight (common practice: bandwidth times latency).
constexpr size_t kPrefetchBytes = 1024;

CREDENCE_INLINE void prefetch_ahead(const float* p) {
    __builtin_prefetch(reinterpret_cast<const char*>(p) + kPrefetchBytes, 0, 0);
}

float dot(const float* a, const float* b, uint32_t K) {
    uint32_t k = 0;
    float total = 0.0f;
    if (K >= uint32_t(kLanes)) {
        Vec acc = load(a) * load(b);
        for (k = kLanes; k + kLanes <= K; k += kLanes) acc = multiply_add(load(a + k), load(b + k), acc);
        total = lane_sum(acc);
    }
    for (; k < K; ++k) total = total + a[k] * b[k];
    return total;
}

void dots(const float* vectors, const float* u, uint32_t K, size_t count, float* out) {
    for (size_t j = 0; j < count; ++j) out[j] = dot(vectors + j * K, u, K);
}

// Few viewers: lanes run along the rank (K a multiple of the lane count);
// each viewer's lanes sum over the group's samples, then fold once.
template <uint32_t KK>
void grouped_by_rank(const GroupedTile& t, double* const* sums) {
    const uint32_t K = KK > 0 ? KK : t.rank, G = t.samples;
    constexpr uint32_t kMaxChunks = 4;  // K <= 4 kLanes here
    for (uint32_t v = 0; v < t.count; ++v) {
        const float* const* u = t.viewers + size_t(v) * G;
        double* sum = sums[v];
        for (uint32_t j = 0; j < t.items; ++j) {
            Vec acc[kMaxChunks] = {};
            for (uint32_t g = 0; g < G; ++g) {
                const float* x = t.slices[g] + size_t(j) * K;
                if (v == 0)
                    for (uint32_t c = 0; c < K; c += 16) prefetch_ahead(x + c);  // one per 64 bytes
                for (uint32_t c = 0; c * kLanes < K; ++c)
                    acc[c] = multiply_add(load(x + c * kLanes), load(u[g] + c * kLanes), acc[c]);
            }
            Vec all = acc[0];
            for (uint32_t c = 1; c * kLanes < K; ++c) all = all + acc[c];
            sum[j] += static_cast<double>(lane_sum(all));
        }
    }
}

// Many viewers: lanes run along the viewers, a block of kLanes at a time.
// For each sample the viewers' factors sit transposed ([rank][kLanes]); each
// item's accumulator takes rank multiply-adds per sample (a small matrix
// product per sample: the tile's items times the viewers' factors).
template <uint32_t KK>
void grouped_by_viewer(const GroupedTile& t, double* const* sums) {
    const uint32_t K = KK > 0 ? KK : t.rank, G = t.samples;
    constexpr uint32_t kItemBlock = 8;  // independent accumulators: enough to hide the multiply-add latency
    // [g][k][lane]: at most kGroupSamples * 64 * kLanes floats.
    alignas(64) float transposed[kGroupSamples * 64 * kLanes];
    for (uint32_t v0 = 0; v0 < t.count; v0 += kLanes) {
        const uint32_t lanes = t.count - v0 < uint32_t(kLanes) ? t.count - v0 : kLanes;
        for (uint32_t g = 0; g < G; ++g)
            for (uint32_t k = 0; k < K; ++k)
                for (uint32_t l = 0; l < uint32_t(kLanes); ++l)
                    transposed[(g * K + k) * kLanes + l] = l < lanes ? t.viewers[size_t(v0 + l) * G + g][k] : 0.0f;
        uint32_t j = 0;
        float out[kItemBlock][kLanes];
        for (; j + kItemBlock <= t.items; j += kItemBlock) {
            Vec acc[kItemBlock] = {};
            for (uint32_t g = 0; g < G; ++g) {
                const float* x = t.slices[g] + size_t(j) * K;
                const float* ut = transposed + size_t(g) * K * kLanes;
                if (v0 == 0)
                    for (uint32_t line = 0; line < kItemBlock * K; line += 16) prefetch_ahead(x + line);
                for (uint32_t k = 0; k < K; ++k) {
                    const Vec u = load(ut + k * kLanes);
                    for (uint32_t b = 0; b < kItemBlock; ++b) acc[b] = multiply_add(splat(x[b * K + k]), u, acc[b]);
                }
            }
            for (uint32_t b = 0; b < kItemBlock; ++b) store(out[b], acc[b]);
            for (uint32_t l = 0; l < lanes; ++l)
                for (uint32_t b = 0; b < kItemBlock; ++b) sums[v0 + l][j + b] += static_cast<double>(out[b][l]);
        }
        for (; j < t.items; ++j) {
            Vec acc = Vec{};
            for (uint32_t g = 0; g < G; ++g) {
                const float* x = t.slices[g] + size_t(j) * K;
                const float* ut = transposed + size_t(g) * K * kLanes;
                for (uint32_t k = 0; k < K; ++k) acc = multiply_add(splat(x[k]), load(ut + k * kLanes), acc);
            }
            store(out[0], acc);
            for (uint32_t l = 0; l < lanes; ++l) sums[v0 + l][j] += static_cast<double>(out[0][l]);
        }
    }
}

// Viewers at or below which the lanes run along the rank.
constexpr uint32_t kFewViewers = 2;

void grouped_sums(const GroupedTile& t, double* const* sums) {
    const bool by_rank = t.count <= kFewViewers && t.rank % kLanes == 0 && t.rank <= 4 * uint32_t(kLanes);
    if (by_rank) {
        if (t.rank == 16) return grouped_by_rank<16>(t, sums);
        if constexpr (32 <= 4 * kLanes)
            if (t.rank == 32) return grouped_by_rank<32>(t, sums);
        return grouped_by_rank<0>(t, sums);
    }
    if (t.rank > 64) {  // beyond the transposed buffer: viewers one at a time, scalar lanes
        for (uint32_t v = 0; v < t.count; ++v)
            for (uint32_t j = 0; j < t.items; ++j) {
                float total = 0.0f;
                for (uint32_t g = 0; g < t.samples; ++g)
                    total = total + dot(t.slices[g] + size_t(j) * t.rank, t.viewers[size_t(v) * t.samples + g], t.rank);
                sums[v][j] += static_cast<double>(total);
            }
        return;
    }
    switch (t.rank) {
        case 8: return grouped_by_viewer<8>(t, sums);
        case 16: return grouped_by_viewer<16>(t, sums);
        case 32: return grouped_by_viewer<32>(t, sums);
        default: return grouped_by_viewer<0>(t, sums);
    }
}

}  // namespace

extern const Table CREDENCE_KERNEL_TABLE = {CREDENCE_KERNEL_LEVEL_NAME, dots, grouped_sums};

CREDENCE_KERNEL_TABLE_FOR("screening kernels")

}  // namespace credence::screening_kernels
