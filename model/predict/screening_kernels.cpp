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

#if CREDENCE_KERNEL_LEVEL > 0
// kLanes IEEE halves widened to floats (exact) with F16C, in registers.
CREDENCE_INLINE Vec load(const uint16_t* p) {
#if CREDENCE_KERNEL_LEVEL == 2
    // The zero-masked form: the plain one trips GCC 12's "may be used uninitialized".
    return reinterpret_cast<Vec>(_mm512_maskz_cvtph_ps(0xffff, _mm256_loadu_si256(reinterpret_cast<const __m256i*>(p))));
#else
    return reinterpret_cast<Vec>(_mm256_cvtph_ps(_mm_loadu_si128(reinterpret_cast<const __m128i*>(p))));
#endif
}
#endif

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
// The hint asks for every cache level (prefetcht0). The non-temporal hint
// (prefetchnta) suits data read once, but how a CPU honours it varies: on
// one 2-core Xeon host it measured the same, on another it made a
// 10k-item pass 4.5 times slower (10.7 ms against 2.35 ms for one viewer,
// serve_bench_tool screen), while the t0, t1 and t2 hints all measured
// within 5% of each other there.
constexpr size_t kPrefetchBytes = 1024;

template <typename T>  // float, or uint16_t for IEEE halves
CREDENCE_INLINE void prefetch_ahead(const T* p) {
    __builtin_prefetch(reinterpret_cast<const char*>(p) + kPrefetchBytes, 0, 3);
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

// Lane sums of kLanes vectors at once, by a halving tree: fold<W> takes two
// vectors whose lanes form blocks of W partial sums per item and adds each
// block's halves, so the result holds blocks of W / 2 for the items of both;
// after the last fold, lane j is the sum of v[j]'s lanes.
struct FoldIndex {
    int lane[kLanes];
};

template <int W, bool Upper>
constexpr FoldIndex fold_index() {
    FoldIndex m{};
    constexpr int half = W / 2, blocks = kLanes / W;
    for (int i = 0; i < kLanes; ++i) {
        const int block = i / half, offset = i % half + (Upper ? half : 0);
        m.lane[i] = block < blocks ? block * W + offset : (block - blocks) * W + offset + kLanes;
    }
    return m;
}

// Lanes of a and b picked by fold_index (indices below kLanes name a's lanes,
// the rest b's). __builtin_shufflevector takes constant indices and is what
// both GCC (12 and later) and clang accept.
template <int W, bool Upper>
CREDENCE_INLINE Vec pick_lanes(Vec a, Vec b) {
    constexpr FoldIndex m = fold_index<W, Upper>();
#if CREDENCE_KERNEL_LEVEL == 2
    return __builtin_shufflevector(a, b, m.lane[0], m.lane[1], m.lane[2], m.lane[3], m.lane[4], m.lane[5],
                                   m.lane[6], m.lane[7], m.lane[8], m.lane[9], m.lane[10], m.lane[11],
                                   m.lane[12], m.lane[13], m.lane[14], m.lane[15]);
#elif CREDENCE_KERNEL_LEVEL == 1
    return __builtin_shufflevector(a, b, m.lane[0], m.lane[1], m.lane[2], m.lane[3], m.lane[4], m.lane[5],
                                   m.lane[6], m.lane[7]);
#else
    return __builtin_shufflevector(a, b, m.lane[0], m.lane[1], m.lane[2], m.lane[3]);
#endif
}

template <int W>
CREDENCE_INLINE Vec fold(Vec a, Vec b) {
    return pick_lanes<W, false>(a, b) + pick_lanes<W, true>(a, b);
}

template <int W>
CREDENCE_INLINE void fold_level(Vec* v) {
    if constexpr (W <= kLanes)
        for (int i = 0; i < W / 2; ++i) v[i] = fold<W>(v[2 * i], v[2 * i + 1]);  // W vectors become W / 2
}

// v[0..kLanes) in, one vector of their lane sums out (v is overwritten).
CREDENCE_INLINE Vec lane_sums(Vec* v) {
    fold_level<16>(v);
    fold_level<8>(v);
    fold_level<4>(v);
    fold_level<2>(v);
    return v[0];
}

// Few viewers: lanes run along the rank (K a multiple of the lane count).
// A block of kLanes items keeps one accumulator each over the group's
// samples and the rank's chunks, then one fold tree sums all of their lanes
// at once. Each item-sample costs K / kLanes multiply-adds per viewer.
// T is float, or uint16_t for IEEE halves widened in registers (levels
// with F16C): the same multiply-adds on the same floats either way.
template <uint32_t KK, uint32_t Block, typename T>
CREDENCE_INLINE void rank_block(const GroupedTile& t, const T* const* rows, const float* const* u, bool prefetch,
                                uint32_t j0, uint32_t block, double* sum) {
    const uint32_t K = KK > 0 ? KK : t.rank, G = t.samples, count = Block > 0 ? Block : block;
    constexpr uint32_t kPerLine = 64 / sizeof(T);
    Vec acc[kLanes] = {};
    for (uint32_t g = 0; g < G; ++g) {
        const T* x = rows[g] + size_t(j0) * K;
        if (prefetch)
            for (uint32_t line = 0; line < count * K; line += kPerLine) prefetch_ahead(x + line);  // one per 64 bytes
        for (uint32_t c = 0; c * kLanes < K; ++c) {
            const Vec w = load(u[g] + c * kLanes);
            // Unrolled, so the kLanes accumulators are independent chains in
            // registers (enough to cover the multiply-add latency).
#pragma GCC unroll 16
            for (uint32_t b = 0; b < count; ++b) acc[b] = multiply_add(load(x + b * K + c * kLanes), w, acc[b]);
        }
    }
    const Vec total = lane_sums(acc);
    if constexpr (Block == uint32_t(kLanes)) {
        // Widened and added kLanes / 2 at a time (the same double adds as one by one).
        typedef float Half __attribute__((vector_size(kLanes / 2 * sizeof(float))));
        typedef double Wide __attribute__((vector_size(kLanes / 2 * sizeof(double)), __may_alias__, __aligned__(8)));
        for (int h = 0; h < 2; ++h) {
            Half part;
            for (int l = 0; l < kLanes / 2; ++l) part[l] = total[h * kLanes / 2 + l];
            Wide* to = reinterpret_cast<Wide*>(sum + j0 + h * kLanes / 2);
            *to = *to + __builtin_convertvector(part, Wide);
        }
    } else {
        for (uint32_t b = 0; b < count; ++b) sum[j0 + b] += static_cast<double>(total[b]);
    }
}

template <uint32_t KK, typename T>
void grouped_by_rank(const GroupedTile& t, const T* const* rows, double* const* sums) {
    // Item blocks outermost: a block's rows under the group's samples (8 KiB
    // at K = 16) stay in L1 for every viewer.
    uint32_t j0 = 0;
    for (; j0 + kLanes <= t.items; j0 += kLanes)
        for (uint32_t v = 0; v < t.count; ++v)
            rank_block<KK, kLanes>(t, rows, t.viewers + size_t(v) * t.samples, v == 0, j0, kLanes, sums[v]);
    if (j0 < t.items)
        for (uint32_t v = 0; v < t.count; ++v)
            rank_block<KK, 0>(t, rows, t.viewers + size_t(v) * t.samples, v == 0, j0, t.items - j0, sums[v]);
}

template <typename T>
void grouped_by_rank_of(const GroupedTile& t, const T* const* rows, double* const* sums) {
    if (t.rank == 16) return grouped_by_rank<16>(t, rows, sums);
    if (t.rank == 32) return grouped_by_rank<32>(t, rows, sums);
    return grouped_by_rank<0>(t, rows, sums);
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

#if CREDENCE_KERNEL_LEVEL == 2
// At most kLanes / 2 viewers at x86-64-v4: grouped_by_viewer would leave
// half of every vector's lanes (and so of its multiply-adds) on zeros.
// Here lane 2l + h holds viewer l's terms of the ranks k = h mod 2: one
// 64-bit broadcast puts an item's factors k and k + 1 in every lane pair,
// so a multiply-add covers two ranks of 8 viewers and an item-sample costs
// K / 2 of them. A lane pair's two float sums are added at the flush: each
// flushed value is still a float sum of samples * rank products.
template <uint32_t KK>
void grouped_by_viewer_pairs(const GroupedTile& t, double* const* sums) {
    constexpr uint32_t kViewers = kLanes / 2;
    const uint32_t K = KK > 0 ? KK : t.rank, G = t.samples, pairs = K / 2, lanes = t.count;
    constexpr uint32_t kItemBlock = 8;  // independent accumulators: enough to hide the multiply-add latency
    // [g][k / 2][lane]: at most kGroupSamples * 32 * kLanes floats.
    alignas(64) float transposed[kGroupSamples * 32 * kLanes];
    for (uint32_t g = 0; g < G; ++g)
        for (uint32_t q = 0; q < pairs; ++q)
            for (uint32_t l = 0; l < kViewers; ++l)
                for (uint32_t h = 0; h < 2; ++h)
                    transposed[(g * pairs + q) * kLanes + 2 * l + h] =
                        l < lanes ? t.viewers[size_t(l) * G + g][2 * q + h] : 0.0f;
    auto pair_splat = [](const float* x) {
        double two;
        __builtin_memcpy(&two, x, sizeof two);
        return reinterpret_cast<Vec>(_mm512_set1_pd(two));
    };
    auto flush = [&](Vec acc, uint32_t j) {
        float out[kLanes];
        store(out, acc);
        for (uint32_t l = 0; l < lanes; ++l) sums[l][j] += static_cast<double>(out[2 * l] + out[2 * l + 1]);
    };
    uint32_t j = 0;
    for (; j + kItemBlock <= t.items; j += kItemBlock) {
        Vec acc[kItemBlock] = {};
        for (uint32_t g = 0; g < G; ++g) {
            const float* x = t.slices[g] + size_t(j) * K;
            const float* ut = transposed + size_t(g) * pairs * kLanes;
            for (uint32_t line = 0; line < kItemBlock * K; line += 16) prefetch_ahead(x + line);
            for (uint32_t q = 0; q < pairs; ++q) {
                const Vec u = load(ut + q * kLanes);
                for (uint32_t b = 0; b < kItemBlock; ++b) acc[b] = multiply_add(pair_splat(x + b * K + 2 * q), u, acc[b]);
            }
        }
        for (uint32_t b = 0; b < kItemBlock; ++b) flush(acc[b], j + b);
    }
    for (; j < t.items; ++j) {
        Vec acc = Vec{};
        for (uint32_t g = 0; g < G; ++g) {
            const float* x = t.slices[g] + size_t(j) * K;
            const float* ut = transposed + size_t(g) * pairs * kLanes;
            for (uint32_t q = 0; q < pairs; ++q) acc = multiply_add(pair_splat(x + 2 * q), load(ut + q * kLanes), acc);
        }
        flush(acc, j);
    }
}
#endif

// Viewers at or below which the lanes run along the rank. Per item-sample,
// along the rank costs a multiply-add per viewer (K = kLanes) plus its share
// of a fold tree and a widening per group; along the viewers, K multiply-adds
// whatever the viewers (up to kLanes). Measured on x86-64-v4 with K = 16
// (serve_bench_tool screen, 10,000 items, 100 samples, CPU ms per pass, the
// two kernels interleaved on a busy machine): 1 viewer 2.4 against 2.8,
// 2 viewers 2.9 against 5.1, 4 viewers even (4.6), 8 viewers 6.0 against 4.0.
// At x86-64-v4, 4 to 8 viewers take grouped_by_viewer_pairs instead; for 2
// viewers it was no faster than along the rank (3.29, 3.16 against 2.93,
// 3.14 ms per pass, same tool, interleaved).
constexpr uint32_t kFewViewers = 3;

bool reads_halves(uint32_t viewers, uint32_t rank) {
    return CREDENCE_KERNEL_LEVEL > 0 && viewers <= kFewViewers && rank % kLanes == 0;
}

void grouped_sums(const GroupedTile& t, double* const* sums) {
#if CREDENCE_KERNEL_LEVEL > 0
    if (t.half_slices != nullptr) {
        if (!reads_halves(t.count, t.rank)) __builtin_trap();  // the caller asks reads_halves first
        return grouped_by_rank_of(t, t.half_slices, sums);
    }
#else
    if (t.half_slices != nullptr) __builtin_trap();  // reads_halves is false at this level
#endif
    const bool by_rank = t.count <= kFewViewers && t.rank % kLanes == 0;
    if (by_rank) return grouped_by_rank_of(t, t.slices, sums);
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
#if CREDENCE_KERNEL_LEVEL == 2
    if (t.count <= uint32_t(kLanes / 2) && t.rank % 2 == 0) {
        if (t.rank == 16) return grouped_by_viewer_pairs<16>(t, sums);
        if (t.rank == 32) return grouped_by_viewer_pairs<32>(t, sums);
        return grouped_by_viewer_pairs<0>(t, sums);
    }
#endif
    switch (t.rank) {
        case 8: return grouped_by_viewer<8>(t, sums);
        case 16: return grouped_by_viewer<16>(t, sums);
        case 32: return grouped_by_viewer<32>(t, sums);
        default: return grouped_by_viewer<0>(t, sums);
    }
}

}  // namespace

extern const Table CREDENCE_KERNEL_TABLE = {CREDENCE_KERNEL_LEVEL_NAME, dots, grouped_sums, reads_halves};

CREDENCE_KERNEL_TABLE_FOR("screening kernels")

}  // namespace credence::screening_kernels
