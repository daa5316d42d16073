#include "model/fit/row_kernels.hpp"

// Compiled once per level (CMakeLists.txt: CREDENCE_KERNEL_LEVEL 0, 1, 2 with
// -march=x86-64, x86-64-v3, x86-64-v4 and -ffp-contract=off). Everything here
// has internal linkage and the file includes no library header with inline
// functions, so no out-of-line copy built for one level can be linked into
// another's callers (tests/model/fit/test_row_kernels.cpp checks the
// symbols). Why the levels give the same bits: model/fit/row_kernels.hpp.
// The per-level frame (the level, the table's name, table_for in the
// baseline build alone): model/math/kernel_level.hpp.

#include "model/math/kernel_level.hpp"

namespace credence::row_kernels {

namespace {

// Native vector of doubles for the level; a panel is 8 doubles at every level.
#if CREDENCE_KERNEL_LEVEL == 2
constexpr int kLanes = 8;
constexpr int kTileRows = 16;       // accumulators per tile: 16 zmm of 32
constexpr int kFirstTileRows = 16;  // and 2 more for s and t
#elif CREDENCE_KERNEL_LEVEL == 1
constexpr int kLanes = 4;
constexpr int kTileRows = 6;        // 12 ymm of 16
constexpr int kFirstTileRows = 4;   // 8, and 4 for s and t
#else
constexpr int kLanes = 2;
constexpr int kTileRows = 3;        // 12 xmm of 16
constexpr int kFirstTileRows = 1;   // 4, and 8 for s and t
#endif
constexpr int kPanel = 8;
constexpr int kPerPanel = kPanel / kLanes;

typedef double Vec __attribute__((vector_size(kLanes * sizeof(double)), __may_alias__, __aligned__(kLanes * sizeof(double))));

CREDENCE_INLINE Vec load(const double* p) { return *reinterpret_cast<const Vec*>(p); }
typedef double VecUnaligned __attribute__((vector_size(kLanes * sizeof(double)), __may_alias__, __aligned__(sizeof(double))));
CREDENCE_INLINE Vec load_unaligned(const double* p) { return *reinterpret_cast<const VecUnaligned*>(p); }
CREDENCE_INLINE void store(double* p, Vec v) { *reinterpret_cast<Vec*>(p) = v; }
CREDENCE_INLINE void store_unaligned(double* p, Vec v) { *reinterpret_cast<VecUnaligned*>(p) = v; }
// Every lane x (not Vec{} + x, which must compute 0 + x for x = -0).
CREDENCE_INLINE Vec splat(double x) {
#if CREDENCE_KERNEL_LEVEL == 2
    return reinterpret_cast<Vec>(_mm512_set1_pd(x));
#elif CREDENCE_KERNEL_LEVEL == 1
    return reinterpret_cast<Vec>(_mm256_set1_pd(x));
#else
    return Vec{x, x};
#endif
}

// c + a b where a b is exact in double (both factors float32 values or 1):
// one rounding, so fused and unfused agree bit for bit.
CREDENCE_INLINE Vec add_exact_product(Vec a, Vec b, Vec c) {
#if CREDENCE_KERNEL_LEVEL == 2
    return reinterpret_cast<Vec>(_mm512_fmadd_pd(reinterpret_cast<__m512d>(a), reinterpret_cast<__m512d>(b),
                                                 reinterpret_cast<__m512d>(c)));
#elif CREDENCE_KERNEL_LEVEL == 1
    return reinterpret_cast<Vec>(_mm256_fmadd_pd(reinterpret_cast<__m256d>(a), reinterpret_cast<__m256d>(b),
                                                 reinterpret_cast<__m256d>(c)));
#else
    return a * b + c;
#endif
}

// c - a b and c + a b in t's sums, the Cholesky factorization, the solves
// and the residuals: fused (rounded once) at the v3 and v4 levels, which therefore
// give the same bits; at the baseline, whose CPUs may lack FMA, a multiply
// then an add (the C library's exact fma() in software was ~180x slower).
// The baseline's draws differ from the others' by rounding alone
// (model/fit/row_kernels.hpp states the bound).
CREDENCE_INLINE Vec sub_product(Vec c, Vec a, Vec b) {
#if CREDENCE_KERNEL_LEVEL == 2
    return reinterpret_cast<Vec>(_mm512_fnmadd_pd(reinterpret_cast<__m512d>(a), reinterpret_cast<__m512d>(b),
                                                  reinterpret_cast<__m512d>(c)));
#elif CREDENCE_KERNEL_LEVEL == 1
    return reinterpret_cast<Vec>(_mm256_fnmadd_pd(reinterpret_cast<__m256d>(a), reinterpret_cast<__m256d>(b),
                                                  reinterpret_cast<__m256d>(c)));
#else
    return c - a * b;
#endif
}
CREDENCE_INLINE double sub_product(double c, double a, double b) {
#if CREDENCE_KERNEL_LEVEL > 0
    return __builtin_fma(-a, b, c);
#else
    return c - a * b;
#endif
}
CREDENCE_INLINE Vec add_product(Vec c, Vec a, Vec b) {
#if CREDENCE_KERNEL_LEVEL > 0
    return add_exact_product(a, b, c);  // the same instruction; here the product need not be exact
#else
    return c + a * b;
#endif
}

constexpr size_t pad8(size_t n) { return (n + 7) / 8 * 8; }

// The scratch layout (scratch_doubles in the header counts the same).
struct Scratch {
    double* x;      // [kGatherRows][p] gathered factor rows, widened
    double* y;      // [kGatherRows] targets r - g - other bias
    double* gram;   // [rank][p] F, upper triangle by panels
    double* s;      // [p] sum x
    double* t;      // [p] sum y x
    double* a;      // [d][ld] precision, then its Cholesky factor U, upper triangles
    double* u;      // [d][ld] (the first ld hold 1 / U[j][j])
    double* rhs;    // [ld]
    double* c;      // [ld]
    double* w;      // [ld] the stored draw, widened
    double* spare;  // [ld]
    size_t p, ld;
};

Scratch layout(double* base, uint32_t rank) {
    Scratch s;
    s.p = pad8(rank);
    s.ld = pad8(rank + 1);
    s.x = base;
    s.y = s.x + size_t(kGatherRows) * s.p;
    s.gram = s.y + kGatherRows;
    s.s = s.gram + size_t(rank) * s.p;
    s.t = s.s + s.p;
    s.a = s.t + s.p;
    s.u = s.a + size_t(rank + 1) * s.ld;
    s.rhs = s.u + size_t(rank + 1) * s.ld;
    s.c = s.rhs + s.ld;
    s.w = s.c + s.ld;
    s.spare = s.w + s.ld;
    return s;
}

// How far ahead the gather prefetches the other side's rows (ratings).
constexpr uint64_t kPrefetchAhead = 16;

// The row's rank, fixed at compile time for the common ranks (KK > 0: 2, 4,
// 8, 16 and 32, the ranks `credence compare` tries by default; draw_row
// dispatches) so loops unroll and vectorize without remainders; KK == 0
// reads it at run time. Both round alike (the kernels are built with
// -ffp-contract=off and run the same loops), so a rank's samples do not
// depend on which path drew them (checked when ranks 2 and 4 got their own
// path: the demo shop's traces were byte for byte those of before).
template <uint32_t KK>
CREDENCE_INLINE uint32_t rank_of(const SideData& side) {
    return KK > 0 ? KK : side.rank;
}

// Gathers ratings [first, first + n) into x (rows of p doubles; columns past
// rank stay zero) and y; adds the targets to sum_y and their squares to
// sum_y2, in rating order.
template <uint32_t KK>
void gather(const SideData& side, uint64_t first, uint32_t n, const Scratch& s, double& sum_y, double& sum_y2) {
    // Everything in locals: through the references, every store to x or y
    // could change them, and the sum would make a round trip through memory
    // for every rating.
    const uint32_t K = rank_of<KK>(side);
    const float* __restrict factors = side.other_factors;
    const float* __restrict other_bias = side.other_bias;
    const uint32_t* __restrict index = side.index + first;
    const float* __restrict value = side.value + first;
    const double global_mean = side.global_mean;
    double* __restrict x = s.x;
    double* __restrict y = s.y;
    const size_t p = s.p;
    const uint64_t prefetch_end = side.nnz > kPrefetchAhead ? side.nnz - kPrefetchAhead : 0;
    double sum = sum_y, sum2 = sum_y2;
    for (uint32_t r = 0; r < n; ++r) {
        if (first + r < prefetch_end) {
            const uint32_t ahead = index[r + kPrefetchAhead];
            const float* f = factors + size_t(ahead) * K;
            __builtin_prefetch(f);
            __builtin_prefetch(f + K - 1);
            if (other_bias) __builtin_prefetch(other_bias + ahead);
        }
        const uint32_t other = index[r];
        const float* f = factors + size_t(other) * K;
        double* row = x + size_t(r) * p;
        for (uint32_t k = 0; k < K; ++k) row[k] = static_cast<double>(f[k]);
        double target = static_cast<double>(value[r]) - global_mean;
        if (other_bias) target -= static_cast<double>(other_bias[other]);
        y[r] = target;
        sum += target;
        const double square = target * target;
        sum2 += square;
    }
    sum_y = sum;
    sum_y2 = sum2;
}

// gram rows [k0, k0 + M) of the panel at col0 += sum over the n gathered rows
// of x[k] x[col0 .. col0 + 8), each entry summed in rating order (from zero
// when `first`). The first tile of a panel (EXTRAS) also sums s += x and
// t += y x for the panel's columns (t's multiply-adds fused above the
// baseline, as add_product says).
template <int M, bool EXTRAS>
void tile(const Scratch& s, const double* x, const double* y, uint32_t n, uint32_t k0, uint32_t col0, bool first) {
    const size_t p = s.p;
    Vec acc[M][kPerPanel], sums[kPerPanel], cross[kPerPanel];
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q)
            acc[i][q] = first ? Vec{} : load(s.gram + (k0 + i) * p + col0 + q * kLanes);
    if constexpr (EXTRAS)
        for (int q = 0; q < kPerPanel; ++q) {
            sums[q] = first ? Vec{} : load(s.s + col0 + q * kLanes);
            cross[q] = first ? Vec{} : load(s.t + col0 + q * kLanes);
        }
    for (uint32_t r = 0; r < n; ++r) {
        const double* row = x + size_t(r) * p;
        const double* rows_k = row + k0;
        Vec v[kPerPanel];
        for (int q = 0; q < kPerPanel; ++q) v[q] = load(row + col0 + q * kLanes);
        for (int i = 0; i < M; ++i) {
            const Vec b = splat(rows_k[i]);
            for (int q = 0; q < kPerPanel; ++q) acc[i][q] = add_exact_product(b, v[q], acc[i][q]);
        }
        if constexpr (EXTRAS) {
            const Vec target = splat(y[r]);
            for (int q = 0; q < kPerPanel; ++q) {
                sums[q] = sums[q] + v[q];
                cross[q] = add_product(cross[q], target, v[q]);
            }
        }
    }
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q) store(s.gram + (k0 + i) * p + col0 + q * kLanes, acc[i][q]);
    if constexpr (EXTRAS)
        for (int q = 0; q < kPerPanel; ++q) {
            store(s.s + col0 + q * kLanes, sums[q]);
            store(s.t + col0 + q * kLanes, cross[q]);
        }
}

template <int M, bool EXTRAS>
void tile_upto(int m, const Scratch& s, const double* x, const double* y, uint32_t n, uint32_t k0, uint32_t col0,
               bool first) {
    if constexpr (M > 0) {
        if (m == M) return tile<M, EXTRAS>(s, x, y, n, k0, col0, first);
        return tile_upto<M - 1, EXTRAS>(m, s, x, y, n, k0, col0, first);
    }
}

// Rows of a block that stay in L1 while every tile of it is summed.
constexpr size_t kBlockDoubles = 2048;  // 16 KiB

// Adds n gathered ratings (the first of the row when `first`) to F (by
// panels), s and t.
template <uint32_t KK>
void accumulate(const SideData& side, const Scratch& s, uint32_t n, bool first) {
    const uint32_t K = rank_of<KK>(side);
    const size_t p = s.p;
    const uint32_t block = static_cast<uint32_t>(kBlockDoubles / p > 8 ? kBlockDoubles / p : 8);
    for (uint32_t r0 = 0; r0 < n; r0 += block) {
        const uint32_t len = n - r0 < block ? n - r0 : block;
        const double* x = s.x + size_t(r0) * p;
        const double* y = s.y + r0;
        const bool zero = first && r0 == 0;
        // The upper triangle: rows [0, min(col0 + 8, K)) of each panel.
        for (uint32_t col0 = 0; col0 < K; col0 += kPanel) {
            const uint32_t rows = col0 + kPanel < K ? col0 + kPanel : K;
            const int m0 = static_cast<int>(rows < uint32_t(kFirstTileRows) ? rows : kFirstTileRows);
            tile_upto<kFirstTileRows, true>(m0, s, x, y, len, 0, col0, zero);
            for (uint32_t k0 = m0; k0 < rows; k0 += kTileRows) {
                const int m = static_cast<int>(rows - k0 < uint32_t(kTileRows) ? rows - k0 : kTileRows);
                tile_upto<kTileRows, false>(m, s, x, y, len, k0, col0, zero);
            }
        }
    }
}

// The row's sums beside F, s and t (which stay in the scratch).
struct TargetSums {
    double sum_y = 0.0;   // sum y
    double sum_y2 = 0.0;  // sum y^2
    double count = 0.0;   // n
};

// Sums the row's statistics and forms P's upper triangle in s.a (row-major,
// ld) and rhs. Returns P's smallest diagonal entry; the target sums go to
// `sums`.
template <uint32_t KK, bool BIASES>
double form_conditional(const SideData& side, uint64_t row, const Scratch& s, TargetSums& sums) {
    const uint32_t K = rank_of<KK>(side), d = K + (BIASES ? 1 : 0);
    const size_t p = s.p, ld = s.ld;
    double sum_y = 0.0, sum_y2 = 0.0;
    const uint64_t begin = side.offsets[row], end = side.offsets[row + 1];
    if (begin == end) {  // no ratings: the prior alone (F, s, t are zero)
        for (size_t i = 0; i < size_t(K) * p; ++i) s.gram[i] = 0.0;
        for (size_t i = 0; i < p; ++i) s.s[i] = s.t[i] = 0.0;
    }
    for (uint64_t at = begin; at < end; at += kGatherRows) {
        const uint32_t n = static_cast<uint32_t>(end - at < kGatherRows ? end - at : kGatherRows);
        gather<KK>(side, at, n, s, sum_y, sum_y2);
        accumulate<KK>(side, s, n, at == begin);
    }
    const double tau = side.tau, count = static_cast<double>(end - begin);
    sums = TargetSums{sum_y, sum_y2, count};
    const Vec tau_v = splat(tau);
    double smallest = 0.0;
    for (uint32_t i = 0; i < d; ++i) {
        double* a = s.a + i * ld;
        const double* prior = side.prior_precision + size_t(i) * d;
        const double* gram = s.gram + size_t(i) * p;
        // Whole vectors from the one holding column i, as the Cholesky
        // factorization and the solves read them: the entries left of i in
        // that vector are never results, but they are finite (prior and
        // gram are, in every entry these loads reach). Entries left of that
        // vector are never read.
        uint32_t k = i / kLanes * kLanes;
        for (; k + kLanes <= K; k += kLanes) store(a + k, load_unaligned(prior + k) + tau_v * load(gram + k));
        for (; k < K; ++k) a[k] = prior[k] + tau * gram[k];
        for (size_t k = d; k < ld; ++k) a[k] = 0.0;  // padding
        if (BIASES) a[K] = prior[K] + tau * (i < K ? s.s[i] : count);
        s.rhs[i] = side.prior_pm[i] + tau * (i < K ? s.t[i] : sum_y);
        if (i == 0 || a[i] < smallest) smallest = a[i];
    }
    return smallest;
}

CREDENCE_INLINE bool finite(double v) { return v - v == 0.0; }

// Cholesky P = U^T U of the upper triangle of a (row-major, ld), in place;
// inv[j] = 1 / U[j][j]. Symmetric elimination first (a[i][k] -= a[j][i]
// a[j][k] / a[j][j], every entry updated in the order of j as the textbook
// sums would be: Golub & Van Loan, Matrix Computations, 4th ed., sections
// 4.1-4.2), then each row scaled by 1 / sqrt(pivot): the square roots stay
// off the chain of dependent pivots. Rows are contiguous, so the updates
// vectorize across entries. False if a pivot is not positive and finite.
//
// Each row's update runs over whole vectors from the one holding its
// diagonal to ld: the extra entries are the row's lower part and padding,
// which are never read as results (form_conditional fills them with finite
// values, so they stay finite), and the loops need no remainders.

// Rows eliminated together by the fixed-size factorization: their vectors
// stay in registers while the rows above them are subtracted.
constexpr uint32_t kRegisterBudget = CREDENCE_KERNEL_LEVEL == 2 ? 24 : 12;
constexpr uint32_t group_rows(size_t vectors_per_row) {
    const size_t g = kRegisterBudget / (vectors_per_row > 0 ? vectors_per_row : 1);
    return g < 1 ? 1 : g > 4 ? 4 : static_cast<uint32_t>(g);
}

// Rows [I0, I0 + G) of a d = D, ld = LD matrix (left-looking): loads them,
// subtracts every finished row j < I0 in order of j, then finishes them one
// by one, each subtracted from the later ones in the group as soon as it is
// done. The same operations on every entry, in the same order, as the
// row-at-a-time elimination in cholesky() below. r[j] = 1 / pivot j.
template <uint32_t D, size_t LD, uint32_t I0, uint32_t G>
CREDENCE_INLINE bool eliminate_group(double* __restrict a, double* __restrict r) {
    constexpr uint32_t V0 = I0 / kLanes, NV = static_cast<uint32_t>(LD / kLanes) - V0;
    Vec acc[G][NV];
#pragma GCC unroll 4
    for (uint32_t g = 0; g < G; ++g)
#pragma GCC unroll 8
        for (uint32_t v = 0; v < NV; ++v)  // (vectors left of the row's own are zeroed, not left stale)
            acc[g][v] = V0 + v < (I0 + g) / kLanes ? Vec{} : load(a + (I0 + g) * LD + (V0 + v) * kLanes);
    for (uint32_t j = 0; j < I0; ++j) {
        const double* ej = a + j * LD;
        const double rj = r[j];
        Vec f[G];
#pragma GCC unroll 4
        for (uint32_t g = 0; g < G; ++g) f[g] = splat(ej[I0 + g] * rj);
#pragma GCC unroll 8
        for (uint32_t v = 0; v < NV; ++v) {
            const Vec e = load(ej + (V0 + v) * kLanes);
#pragma GCC unroll 4
            for (uint32_t g = 0; g < G; ++g) acc[g][v] = sub_product(acc[g][v], f[g], e);
        }
    }
    bool ok = true;
#pragma GCC unroll 4
    for (uint32_t g = 0; g < G; ++g) {
        const uint32_t i = I0 + g;
        const double pivot = acc[g][i / kLanes - V0][i % kLanes];
        ok = ok && pivot > 0.0 && finite(pivot);
        const double rg = 1.0 / pivot;
        r[i] = rg;
#pragma GCC unroll 4
        for (uint32_t h = g + 1; h < G; ++h) {
            const uint32_t col = I0 + h;
            const Vec f = splat(acc[g][col / kLanes - V0][col % kLanes] * rg);
#pragma GCC unroll 8
            for (uint32_t v = 0; v < NV; ++v) acc[h][v] = sub_product(acc[h][v], f, acc[g][v]);
        }
#pragma GCC unroll 8
        for (uint32_t v = 0; v < NV; ++v) store(a + i * LD + (V0 + v) * kLanes, acc[g][v]);
    }
    return ok;
}

template <uint32_t D, size_t LD, uint32_t I0>
CREDENCE_INLINE bool eliminate_from(double* __restrict a, double* __restrict r) {
    if constexpr (I0 >= D) {
        return true;
    } else {
        constexpr uint32_t G0 = group_rows(LD / kLanes - I0 / kLanes);
        constexpr uint32_t G = G0 < D - I0 ? G0 : D - I0;
        if (!eliminate_group<D, LD, I0, G>(a, r)) return false;
        return eliminate_from<D, LD, I0 + G>(a, r);
    }
}

// With DD > 0 the sizes are compile-time constants (DD = d, LD = ld) and the
// elimination runs by groups of rows (eliminate_group); with DD == 0, a row
// at a time, right-looking.
template <uint32_t DD, size_t LD>
bool cholesky(double* __restrict a, double* __restrict inv, uint32_t d_runtime, size_t ld_runtime) {
    const uint32_t d = DD > 0 ? DD : d_runtime;
    const size_t ld = DD > 0 ? LD : ld_runtime;
    if constexpr (DD > 0) {
        // inv holds 1 / pivot until the scaling below replaces it.
        if (!eliminate_from<DD, LD, 0>(a, inv)) return false;
    } else {
        for (uint32_t j = 0; j < d; ++j) {
            const double* uj = a + j * ld;
            const double pivot = uj[j];
            if (!(pivot > 0.0) || !finite(pivot)) return false;
            const double r = 1.0 / pivot;
            for (uint32_t i = j + 1; i < d; ++i) {
                const Vec f = splat(uj[i] * r);
                double* ai = a + i * ld;
                for (size_t k = i / kLanes * kLanes; k < ld; k += kLanes) store(ai + k, sub_product(load(ai + k), f, load(uj + k)));
            }
        }
    }
    for (uint32_t j = 0; j < d; ++j) {
        double* uj = a + j * ld;
        const double l = __builtin_sqrt(uj[j]);
        const double q = 1.0 / l;
        inv[j] = q;
        const Vec qv = splat(q);
        for (size_t k = j / kLanes * kLanes; k < ld; k += kLanes) store(uj + k, load(uj + k) * qv);
        uj[j] = l;
    }
    return true;
}

// Between the solves: c = forward + z, or overrelaxed (current not null)
// c = (1 - a) forward + sqrt(1 - a^2) z; after them, out += a x.
CREDENCE_INLINE void add_noise(const SideData& side, const double* forward, const double* z, const double* current,
                               uint32_t d, double* c) {
    if (current) {
        const double keep = 1.0 - side.overrelax, noise = side.overrelax_noise;
        for (uint32_t i = 0; i < d; ++i) c[i] = keep * forward[i] + noise * z[i];
    } else {
        for (uint32_t i = 0; i < d; ++i) c[i] = forward[i] + z[i];
    }
}

// The backward pass: U x = c by columns of U (u row-major with leading
// dimension ld, inv[i] = 1 / U[i][i]); writes x to out and overwrites c.
// Always inlined, so with fixed sizes d and ld are constants.
CREDENCE_INLINE void solve_upper(const double* __restrict u, size_t ld, const double* __restrict inv, uint32_t d,
                                 double* __restrict c, double* __restrict out) {
    for (uint32_t i = d; i-- > 0;) {
        const double xi = c[i] * inv[i];
        out[i] = xi;
        for (uint32_t k = 0; k < i; ++k) c[k] = sub_product(c[k], u[k * ld + i], xi);
    }
}

CREDENCE_INLINE void add_current(const SideData& side, const double* current, uint32_t d, double* out) {
    if (current)
        for (uint32_t i = 0; i < d; ++i) out[i] = out[i] + side.overrelax * current[i];
}

// out = U^-1 (U^-T rhs + z): the mean P^-1 rhs plus U^-1 z, whose covariance
// is (U^T U)^-1 = P^-1. Overrelaxed (side.overrelax = a != 0, `current` the
// row's value x): out = U^-1 ((1 - a) U^-T rhs + sqrt(1 - a^2) z) + a x,
// the mean plus a (x - mean) plus sqrt(1 - a^2) U^-1 z. The forward pass runs by rows of U, vectorized
// across the entries below j (entries at or above j in the same vector get
// values never read: the results go to out first); the backward pass by
// columns of U.
//
// With fixed sizes (D = d, LD = ld) the forward pass unrolls completely and
// its running vector stays in registers (through memory, each step waited
// for a store to be forwarded to the next step's load); the backward pass
// is the same as with run-time sizes (solve_upper).
template <uint32_t D, size_t LD>
CREDENCE_INLINE void solve_fixed(const SideData& side, const Scratch& s, const double* __restrict inv,
                                 const double* __restrict z, const double* __restrict current,
                                 double* __restrict out) {
    constexpr uint32_t NV = static_cast<uint32_t>(LD / kLanes);
    const double* __restrict u = s.a;
    double* __restrict c = s.c;
    for (uint32_t i = 0; i < D; ++i) c[i] = s.rhs[i];
    for (size_t i = D; i < LD; ++i) c[i] = 0.0;
    Vec cv[NV];
#pragma GCC unroll 8
    for (uint32_t v = 0; v < NV; ++v) cv[v] = load(c + v * kLanes);
#pragma GCC unroll 64
    for (uint32_t j = 0; j < D; ++j) {  // U^T c = rhs, by rows of U
        const double cj = cv[j / kLanes][j % kLanes] * inv[j];
        out[j] = cj;
        const Vec b = splat(cj);
#pragma GCC unroll 8
        for (uint32_t v = (j + 1) / kLanes; v < NV; ++v) cv[v] = sub_product(cv[v], load(u + j * LD + v * kLanes), b);
    }
    add_noise(side, out, z, current, D, c);
    solve_upper(u, LD, inv, D, c, out);
    add_current(side, current, D, out);
}

template <uint32_t DD, size_t LD>
void solve_and_draw(const SideData& side, const Scratch& s, uint32_t d_runtime, const double* __restrict inv,
                    const double* __restrict z, const double* __restrict current, double* __restrict out) {
    if constexpr (DD > 0) {
        return solve_fixed<DD, LD>(side, s, inv, z, current, out);
    } else {
        const uint32_t d = d_runtime;
        const size_t ld = s.ld;
        const double* __restrict u = s.a;
        double* __restrict c = s.c;
        for (uint32_t i = 0; i < d; ++i) c[i] = s.rhs[i];
        for (size_t i = d; i < ld; ++i) c[i] = 0.0;
        for (uint32_t j = 0; j < d; ++j) {  // U^T c = rhs, by rows of U
            const double cj = c[j] * inv[j];
            out[j] = cj;
            const Vec cv = splat(cj);
            const double* uj = u + j * ld;
            for (size_t k = (j + 1) / kLanes * kLanes; k < ld; k += kLanes) store(c + k, sub_product(load(c + k), load(uj + k), cv));
        }
        add_noise(side, out, z, current, d, c);
        solve_upper(u, ld, inv, d, c, out);
        add_current(side, current, d, out);
    }
}

// The row's sum of squared residuals with the stored row w (bias b = w[K]),
// from its sums rather than a second pass over its ratings:
//     sum (y - x.w - b)^2 = sum y^2 - 2 (w.t + b sum y) + w^T F w + 2 b (w.s) + n b^2.
// F is held as its upper triangle by panels with the diagonal blocks whole,
// so w^T F w = sum_i w_i (F[i][own panel] . w[own panel])
//            + sum_i 2 w_i (F[i][later panels] . w[later panels]).
// The sums run in vectors whose lanes are the 8 positions of a panel (two
// vectors of 4 at v3, one of 8 at v4, so both add the same terms in the same
// order), and the lanes are added in order at the end. Padding columns of
// F, s and t are zero, so the bias in w's padding adds nothing. Rounding:
// within gamma_{n + K + 20} of the sum of the terms' magnitudes
// (tests/model/fit/test_row_kernels.cpp); it can be a rounding-level
// negative number when a row fits its ratings almost exactly.
template <uint32_t KK, bool BIASES>
double residuals_from_sums(const SideData& side, const Scratch& s, const TargetSums& sums) {
    const uint32_t K = rank_of<KK>(side);
    const size_t p = s.p;
    Vec quadratic[kPerPanel], along_t[kPerPanel], along_s[kPerPanel];
    for (int q = 0; q < kPerPanel; ++q) quadratic[q] = along_t[q] = along_s[q] = Vec{};
    for (uint32_t i = 0; i < K; ++i) {
        const uint32_t own = i / kPanel * kPanel;
        const Vec once = splat(s.w[i]), twice = splat(2.0 * s.w[i]);
        for (uint32_t col0 = own; col0 < K; col0 += kPanel) {
            const Vec c = col0 == own ? once : twice;
            for (int q = 0; q < kPerPanel; ++q) {
                const Vec fw = load(s.gram + i * p + col0 + q * kLanes) * load(s.w + col0 + q * kLanes);
                quadratic[q] = add_product(quadratic[q], c, fw);
            }
        }
    }
    for (uint32_t col0 = 0; col0 < K; col0 += kPanel)
        for (int q = 0; q < kPerPanel; ++q) {
            const Vec w = load(s.w + col0 + q * kLanes);
            along_t[q] = add_product(along_t[q], w, load(s.t + col0 + q * kLanes));
            along_s[q] = add_product(along_s[q], w, load(s.s + col0 + q * kLanes));
        }
    double wfw = 0.0, wt = 0.0, ws = 0.0;
    for (int q = 0; q < kPerPanel; ++q)
        for (int l = 0; l < kLanes; ++l) {
            wfw = wfw + quadratic[q][l];
            wt = wt + along_t[q][l];
            ws = ws + along_s[q][l];
        }
    const double b = BIASES ? s.w[K] : 0.0;
    const double linear = wt + b * sums.sum_y;
    const double with_bias = 2.0 * b * ws + sums.count * b * b;
    return ((sums.sum_y2 - 2.0 * linear) + wfw) + with_bias;
}

template <uint32_t KK, bool BIASES>
void conditional_for(const SideData& side, uint64_t row, double* scratch, double* precision, double* rhs) {
    const Scratch s = layout(scratch, side.rank);
    TargetSums sums;
    form_conditional<KK, BIASES>(side, row, s, sums);
    const uint32_t d = side.rank + (BIASES ? 1 : 0);
    for (uint32_t i = 0; i < d; ++i) {
        rhs[i] = s.rhs[i];
        for (uint32_t k = i; k < d; ++k) precision[size_t(i) * d + k] = precision[size_t(k) * d + i] = s.a[i * s.ld + k];
    }
}

template <uint32_t KK, bool BIASES>
bool draw_row_for(const SideData& side, uint64_t row, const double* normals, double* scratch, float* factor,
                  float* bias, double* sse, double* smallest_diagonal) {
    constexpr uint32_t DD = KK > 0 ? KK + (BIASES ? 1 : 0) : 0;
    constexpr size_t LD = pad8(KK + 1);  // s.ld when KK > 0
    const uint32_t K = rank_of<KK>(side), d = K + (BIASES ? 1 : 0);
    const Scratch s = layout(scratch, K);
    TargetSums sums;
    const double smallest = form_conditional<KK, BIASES>(side, row, s, sums);
    double* out = s.spare;
    double* inv = s.u;
    bool ok = cholesky<DD, LD>(s.a, inv, d, s.ld);
    if (ok) {
        // The row's current value, for an overrelaxed draw (s.w is free
        // until the residuals below).
        const double* current = nullptr;
        if (side.overrelax != 0.0) {
            for (uint32_t k = 0; k < K; ++k) s.w[k] = static_cast<double>(factor[k]);
            if (BIASES) s.w[K] = static_cast<double>(*bias);
            current = s.w;
        }
        solve_and_draw<DD, LD>(side, s, d, inv, normals, current, out);
        for (uint32_t i = 0; i < d; ++i) ok = ok && finite(out[i]);
    }
    if (!ok) {
        *smallest_diagonal = smallest;
        return false;
    }
    for (uint32_t k = 0; k < K; ++k) {
        factor[k] = static_cast<float>(out[k]);
        s.w[k] = static_cast<double>(factor[k]);
    }
    if (BIASES) {
        *bias = static_cast<float>(out[K]);
        s.w[K] = static_cast<double>(*bias);
    }
    if (sse) *sse = residuals_from_sums<KK, BIASES>(side, s, sums);  // with the values as stored
    return true;
}

template <uint32_t KK>
bool draw_row_rank(const SideData& side, uint64_t row, const double* normals, double* scratch, float* factor,
                   float* bias, double* sse, double* smallest_diagonal) {
    return side.biases ? draw_row_for<KK, true>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal)
                       : draw_row_for<KK, false>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
}

bool draw_row(const SideData& side, uint64_t row, const double* normals, double* scratch, float* factor, float* bias,
              double* sse, double* smallest_diagonal) {
    switch (side.rank) {
        case 2: return draw_row_rank<2>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
        case 4: return draw_row_rank<4>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
        case 8: return draw_row_rank<8>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
        case 16: return draw_row_rank<16>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
        case 32: return draw_row_rank<32>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
        default: return draw_row_rank<0>(side, row, normals, scratch, factor, bias, sse, smallest_diagonal);
    }
}

// The conditional alone (tests compare it between levels): one generic path.
void conditional(const SideData& side, uint64_t row, double* scratch, double* precision, double* rhs) {
    if (side.biases) conditional_for<0, true>(side, row, scratch, precision, rhs);
    else conditional_for<0, false>(side, row, scratch, precision, rhs);
}

// Outputs [col0, col0 + 8 NP) of the map of one row (in: its floats), into out.
template <uint32_t NP>
CREDENCE_INLINE void map_outputs(const float* in, uint32_t K, const double* map, size_t stride, size_t col0,
                                 double* out) {
    constexpr int kVectors = static_cast<int>(NP) * kPerPanel;
    Vec acc[kVectors];
    for (int v = 0; v < kVectors; ++v) acc[v] = Vec{};
    for (uint32_t m = 0; m < K; ++m) {
        const Vec x = splat(static_cast<double>(in[m]));
        const double* column = map + size_t(m) * stride + col0;
        for (int v = 0; v < kVectors; ++v) {
            const Vec product = load_unaligned(column + v * kLanes) * x;
            acc[v] = acc[v] + product;
        }
    }
    for (int v = 0; v < kVectors; ++v) store_unaligned(out + col0 + v * kLanes, acc[v]);
}

// Up to 4 panels (32 outputs) at a time, so the sums stay in registers.
void map_rows(float* rows, uint64_t count, uint32_t K, const double* map, size_t stride, double* out) {
    for (uint64_t r = 0; r < count; ++r) {
        float* row = rows + r * K;
        for (size_t col0 = 0; col0 < stride; col0 += 4 * kPanel) {
            switch ((stride - col0) / kPanel) {
                case 1: map_outputs<1>(row, K, map, stride, col0, out); break;
                case 2: map_outputs<2>(row, K, map, stride, col0, out); break;
                case 3: map_outputs<3>(row, K, map, stride, col0, out); break;
                default: map_outputs<4>(row, K, map, stride, col0, out); break;
            }
        }
        for (uint32_t k = 0; k < K; ++k) row[k] = static_cast<float>(out[k]);
    }
}

// lower rows [j0, j0 + M) of the panel at col0 += sum over the n rows of x
// (rows `stride` doubles apart) of x[j] x[col0 .. col0 + 8), and with CROSS
// cross[col0 .. col0 + 8) += w x[col0 .. col0 + 8), each entry summed in row
// order with a multiply then an add, as gram_rows always summed. lower and
// cross are plain std::vector storage, so unaligned.
template <int M, bool CROSS>
void gram_tile(const double* x, size_t stride, const float* weights, uint32_t n, uint32_t j0, uint32_t col0,
               double* lower, double* cross) {
    Vec acc[M][kPerPanel], sums[kPerPanel];
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q) acc[i][q] = load_unaligned(lower + (j0 + i) * stride + col0 + q * kLanes);
    if constexpr (CROSS)
        for (int q = 0; q < kPerPanel; ++q) sums[q] = load_unaligned(cross + col0 + q * kLanes);
    for (uint32_t r = 0; r < n; ++r) {
        const double* row = x + size_t(r) * stride;
        Vec v[kPerPanel];
        for (int q = 0; q < kPerPanel; ++q) v[q] = load_unaligned(row + col0 + q * kLanes);
        for (int i = 0; i < M; ++i) {
            const Vec b = splat(row[j0 + i]);
            for (int q = 0; q < kPerPanel; ++q) {
                const Vec product = b * v[q];
                acc[i][q] = acc[i][q] + product;
            }
        }
        if constexpr (CROSS) {
            const Vec c = splat(static_cast<double>(weights[r]));
            for (int q = 0; q < kPerPanel; ++q) {
                const Vec product = c * v[q];
                sums[q] = sums[q] + product;
            }
        }
    }
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q) store_unaligned(lower + (j0 + i) * stride + col0 + q * kLanes, acc[i][q]);
    if constexpr (CROSS)
        for (int q = 0; q < kPerPanel; ++q) store_unaligned(cross + col0 + q * kLanes, sums[q]);
}

template <int M, bool CROSS>
void gram_tile_upto(int m, const double* x, size_t stride, const float* weights, uint32_t n, uint32_t j0,
                    uint32_t col0, double* lower, double* cross) {
    if constexpr (M > 0) {
        if (m == M) return gram_tile<M, CROSS>(x, stride, weights, n, j0, col0, lower, cross);
        return gram_tile_upto<M - 1, CROSS>(m, x, stride, weights, n, j0, col0, lower, cross);
    }
}

// By chunks of kGramChunkRows rows: the chunk's rows widened (and centered)
// into d, then each panel of 8 columns by tiles of lower rows whose sums stay
// in registers over the chunk (through memory, every row's update of an
// entry waited for the previous row's store).
void gram_rows(const float* rows, uint64_t count, uint32_t K, const double* center, const float* weights,
               size_t stride, double* lower, double* cross, double* d) {
    for (uint64_t r0 = 0; r0 < count; r0 += kGramChunkRows) {
        const uint32_t n = static_cast<uint32_t>(count - r0 < kGramChunkRows ? count - r0 : kGramChunkRows);
        for (uint32_t r = 0; r < n; ++r) {
            const float* row = rows + (r0 + r) * K;
            double* out = d + size_t(r) * stride;
            if (center)
                for (uint32_t k = 0; k < K; ++k) out[k] = static_cast<double>(row[k]) - center[k];
            else
                for (uint32_t k = 0; k < K; ++k) out[k] = static_cast<double>(row[k]);
            for (size_t k = K; k < stride; ++k) out[k] = 0.0;
        }
        const float* w = cross ? weights + r0 : nullptr;
        for (uint32_t col0 = 0; col0 < K; col0 += kPanel) {
            // Rows j >= col0 have entries in this panel (those right of j
            // are written, never results).
            const uint32_t first = K - col0 < uint32_t(kFirstTileRows) ? K - col0 : uint32_t(kFirstTileRows);
            if (cross)
                gram_tile_upto<kFirstTileRows, true>(int(first), d, stride, w, n, col0, col0, lower, cross);
            else
                gram_tile_upto<kFirstTileRows, false>(int(first), d, stride, w, n, col0, col0, lower, cross);
            for (uint32_t j0 = col0 + first; j0 < K; j0 += kTileRows) {
                const int m = static_cast<int>(K - j0 < uint32_t(kTileRows) ? K - j0 : uint32_t(kTileRows));
                gram_tile_upto<kTileRows, false>(m, d, stride, w, n, j0, col0, lower, cross);
            }
        }
    }
}

}  // namespace

extern const Table CREDENCE_KERNEL_TABLE = {CREDENCE_KERNEL_LEVEL_NAME, conditional, draw_row, map_rows, gram_rows};

CREDENCE_KERNEL_TABLE_FOR("row kernels")

}  // namespace credence::row_kernels
