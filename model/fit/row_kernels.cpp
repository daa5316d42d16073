#include "model/fit/row_kernels.hpp"

// Compiled once per level (CMakeLists.txt: CREDENCE_KERNEL_LEVEL 0, 1, 2 with
// -march=x86-64, x86-64-v3, x86-64-v4 and -ffp-contract=off). Everything here
// has internal linkage and the file includes no library header with inline
// functions, so no out-of-line copy built for one level can be linked into
// another's callers (tests/model/fit/test_row_kernels.cpp checks the
// symbols). Why the levels give the same bits: model/fit/row_kernels.hpp.

#ifndef CREDENCE_KERNEL_LEVEL
#define CREDENCE_KERNEL_LEVEL 0
#endif
#if CREDENCE_KERNEL_LEVEL > 0
#include <immintrin.h>
#else
// The baseline build alone also holds the level switch (ordinary code).
#include <stdexcept>
#include <string>
#endif

namespace credence::row_kernels {

namespace {

// Native vector of doubles for the level; a panel is 8 doubles at every level.
#if CREDENCE_KERNEL_LEVEL == 2
constexpr int kLanes = 8;
constexpr int kTileRows = 16;  // accumulators per tile: 16 zmm of 32
const char* const kLevelName = "x86-64-v4";
#elif CREDENCE_KERNEL_LEVEL == 1
constexpr int kLanes = 4;
constexpr int kTileRows = 6;   // 12 ymm of 16
const char* const kLevelName = "x86-64-v3";
#else
constexpr int kLanes = 2;
constexpr int kTileRows = 3;   // 12 xmm of 16
const char* const kLevelName = "x86-64";
#endif
constexpr int kPanel = 8;
constexpr int kPerPanel = kPanel / kLanes;

typedef double Vec __attribute__((vector_size(kLanes * sizeof(double)), __may_alias__, __aligned__(kLanes * sizeof(double))));

#define CREDENCE_INLINE inline __attribute__((always_inline))

CREDENCE_INLINE Vec load(const double* p) { return *reinterpret_cast<const Vec*>(p); }
CREDENCE_INLINE void store(double* p, Vec v) { *reinterpret_cast<Vec*>(p) = v; }
CREDENCE_INLINE Vec splat(double x) { return Vec{} + x; }

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

constexpr size_t pad8(size_t n) { return (n + 7) / 8 * 8; }

// The scratch layout (scratch_doubles in the header counts the same).
struct Scratch {
    double* x;      // [kGatherRows][p] gathered factor rows, widened
    double* y;      // [kGatherRows] targets r - g - other bias
    double* gram;   // [rank][p] F, lower triangle by panels
    double* s;      // [p] sum x
    double* t;      // [p] sum y x
    double* a;      // [d][ld] precision, then L in its lower triangle
    double* u;      // [d][ld] L^T: row j is column j of L
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
constexpr uint64_t kPrefetchAhead = 12;

// Gathers ratings [first, first + n) into x (rows of p doubles; columns past
// rank stay zero) and y.
void gather(const SideData& side, uint64_t first, uint32_t n, const Scratch& s) {
    const uint32_t K = side.rank;
    const float* factors = side.other_factors;
    for (uint32_t r = 0; r < n; ++r) {
        const uint64_t at = first + r;
        if (at + kPrefetchAhead < side.nnz) {
            const uint32_t ahead = side.index[at + kPrefetchAhead];
            const float* f = factors + size_t(ahead) * K;
            __builtin_prefetch(f);
            __builtin_prefetch(f + K - 1);
            if (side.other_bias) __builtin_prefetch(side.other_bias + ahead);
        }
        const uint32_t other = side.index[at];
        const float* f = factors + size_t(other) * K;
        double* row = s.x + size_t(r) * s.p;
        for (uint32_t k = 0; k < K; ++k) row[k] = static_cast<double>(f[k]);
        double target = static_cast<double>(side.value[at]) - side.global_mean;
        if (side.other_bias) target -= static_cast<double>(side.other_bias[other]);
        s.y[r] = target;
    }
}

// gram rows [k0, k0 + M) of panel col0 += sum over the n gathered rows of
// x[k] x[col0 .. col0 + 8), each entry summed in rating order.
template <int M>
void tile(const double* x, size_t p, uint32_t n, uint32_t k0, uint32_t col0, double* gram) {
    Vec acc[M][kPerPanel];
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q) acc[i][q] = load(gram + (k0 + i) * p + col0 + q * kLanes);
    for (uint32_t r = 0; r < n; ++r) {
        const double* row = x + size_t(r) * p;
        Vec v[kPerPanel];
        for (int q = 0; q < kPerPanel; ++q) v[q] = load(row + col0 + q * kLanes);
        for (int i = 0; i < M; ++i) {
            const Vec b = splat(row[k0 + i]);
            for (int q = 0; q < kPerPanel; ++q) acc[i][q] = add_exact_product(b, v[q], acc[i][q]);
        }
    }
    for (int i = 0; i < M; ++i)
        for (int q = 0; q < kPerPanel; ++q) store(gram + (k0 + i) * p + col0 + q * kLanes, acc[i][q]);
}

template <int M>
void tile_upto(int m, const double* x, size_t p, uint32_t n, uint32_t k0, uint32_t col0, double* gram) {
    if constexpr (M > 0) {
        if (m == M) return tile<M>(x, p, n, k0, col0, gram);
        return tile_upto<M - 1>(m, x, p, n, k0, col0, gram);
    }
}

// Rows of a tile block that stay in L1 while every tile of it is summed.
constexpr size_t kBlockDoubles = 2048;  // 16 KiB

// Adds n gathered ratings to F (by panels), s, t, sum y.
void accumulate(const Scratch& s, uint32_t K, uint32_t n, double& sum_y) {
    const size_t p = s.p;
    const uint32_t block = static_cast<uint32_t>(kBlockDoubles / p > 8 ? kBlockDoubles / p : 8);
    for (uint32_t r0 = 0; r0 < n; r0 += block) {
        const uint32_t len = n - r0 < block ? n - r0 : block;
        const double* x = s.x + size_t(r0) * p;
        for (uint32_t col0 = 0; col0 < K; col0 += kPanel)
            for (uint32_t k0 = col0; k0 < K; k0 += kTileRows) {
                const int m = static_cast<int>(K - k0 < uint32_t(kTileRows) ? K - k0 : kTileRows);
                tile_upto<kTileRows>(m, x, p, len, k0, col0, s.gram);
            }
        // s += x (exact terms, as the bias slot's products with 1); t += y x
        // with a separate multiply and add (y is a double).
        for (size_t q = 0; q < p; q += kLanes) {
            Vec sq = load(s.s + q), tq = load(s.t + q);
            for (uint32_t r = 0; r < len; ++r) {
                const Vec v = load(x + size_t(r) * p + q);
                sq = sq + v;
                const Vec product = splat(s.y[r0 + r]) * v;
                tq = tq + product;
            }
            store(s.s + q, sq);
            store(s.t + q, tq);
        }
        for (uint32_t r = 0; r < len; ++r) sum_y += s.y[r0 + r];
    }
}

// Sums the row's statistics and forms P (lower triangle into s.a, both
// triangles into `precision` when given) and rhs. Returns P's smallest diagonal.
double form_conditional(const SideData& side, uint64_t row, const Scratch& s, double* precision) {
    const uint32_t K = side.rank, d = K + (side.biases ? 1 : 0);
    const size_t p = s.p, ld = s.ld;
    for (size_t i = 0; i < size_t(K) * p; ++i) s.gram[i] = 0.0;
    for (size_t i = 0; i < p; ++i) s.s[i] = s.t[i] = 0.0;
    double sum_y = 0.0;
    const uint64_t begin = side.offsets[row], end = side.offsets[row + 1];
    for (uint64_t at = begin; at < end; at += kGatherRows) {
        const uint32_t n = static_cast<uint32_t>(end - at < kGatherRows ? end - at : kGatherRows);
        gather(side, at, n, s);
        accumulate(s, K, n, sum_y);
    }
    const double tau = side.tau, count = static_cast<double>(end - begin);
    double smallest = 0.0;
    for (uint32_t i = 0; i < d; ++i) {
        double* a = s.a + i * ld;
        const double* prior = side.prior_precision + size_t(i) * d;
        for (uint32_t j = 0; j <= i; ++j) {
            double data;
            if (i < K) data = s.gram[size_t(i) * p + j];
            else data = j < K ? s.s[j] : count;  // the bias row: sum x, then n
            a[j] = prior[j] + tau * data;
        }
        s.rhs[i] = side.prior_pm[i] + tau * (i < K ? s.t[i] : sum_y);
        if (i == 0 || a[i] < smallest) smallest = a[i];
    }
    if (precision)
        for (uint32_t i = 0; i < d; ++i)
            for (uint32_t j = 0; j <= i; ++j) precision[size_t(i) * d + j] = precision[size_t(j) * d + i] = s.a[i * ld + j];
    return smallest;
}

CREDENCE_INLINE bool finite(double v) { return v - v == 0.0; }

// Right-looking Cholesky of the lower triangle of a (row-major, ld): L into
// a's lower triangle, L^T into u. Every entry is updated in the order of j,
// as the textbook left-looking sums would (Golub & Van Loan, Matrix
// Computations, 4th ed., section 4.2). False if a pivot is not positive and finite.
bool cholesky(double* a, double* u, uint32_t d, size_t ld) {
    for (uint32_t j = 0; j < d; ++j) {
        const double pivot = a[j * ld + j];
        if (!(pivot > 0.0) || !finite(pivot)) return false;
        const double l = __builtin_sqrt(pivot);
        a[j * ld + j] = l;
        double* uj = u + j * ld;
        uj[j] = l;
        for (uint32_t i = j + 1; i < d; ++i) {
            const double lij = a[i * ld + j] / l;
            a[i * ld + j] = lij;
            uj[i] = lij;
        }
        for (uint32_t i = j + 1; i < d; ++i) {
            const double lij = uj[i];
            double* ai = a + i * ld;
            for (uint32_t k = j + 1; k <= i; ++k) ai[k] = ai[k] - lij * uj[k];
        }
    }
    return true;
}

// out = L^-T (L^-1 rhs + z): mean + L^-T z with mean = P^-1 rhs.
void solve_and_draw(const Scratch& s, uint32_t d, const double* z, double* out) {
    const size_t ld = s.ld;
    double* c = s.c;
    for (uint32_t i = 0; i < d; ++i) c[i] = s.rhs[i];
    for (uint32_t j = 0; j < d; ++j) {  // L c = rhs, by columns of L (rows of u)
        const double cj = c[j] / s.u[j * ld + j];
        c[j] = cj;
        const double* uj = s.u + j * ld;
        for (uint32_t i = j + 1; i < d; ++i) c[i] = c[i] - uj[i] * cj;
    }
    for (uint32_t i = 0; i < d; ++i) c[i] = c[i] + z[i];
    for (uint32_t i = d; i-- > 0;) {  // L^T x = c, by rows of L
        const double xi = c[i] / s.a[i * ld + i];
        out[i] = xi;
        const double* ai = s.a + i * ld;
        for (uint32_t k = 0; k < i; ++k) c[k] = c[k] - ai[k] * xi;
    }
}

// Squared residuals of ratings [first, first + n) (gathered in s) with the
// stored row w (bias in w[K]).
double residuals(const Scratch& s, uint32_t K, bool biases, uint32_t n) {
    double sse = 0.0;
    for (uint32_t r = 0; r < n; ++r) {
        const double* x = s.x + size_t(r) * s.p;
        double prediction = biases ? s.w[K] : 0.0;
        for (uint32_t k = 0; k < K; ++k) prediction = prediction + x[k] * s.w[k];
        const double e = s.y[r] - prediction;
        sse = sse + e * e;
    }
    return sse;
}

void conditional(const SideData& side, uint64_t row, double* scratch, double* precision, double* rhs) {
    const Scratch s = layout(scratch, side.rank);
    form_conditional(side, row, s, precision);
    const uint32_t d = side.rank + (side.biases ? 1 : 0);
    for (uint32_t i = 0; i < d; ++i) rhs[i] = s.rhs[i];
}

bool draw_row(const SideData& side, uint64_t row, const double* normals, double* scratch, float* factor, float* bias,
              double* sse, double* smallest_diagonal) {
    const uint32_t K = side.rank, d = K + (side.biases ? 1 : 0);
    const Scratch s = layout(scratch, K);
    const double smallest = form_conditional(side, row, s, nullptr);
    double* out = s.spare;
    bool ok = cholesky(s.a, s.u, d, s.ld);
    if (ok) {
        solve_and_draw(s, d, normals, out);
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
    if (side.biases) {
        *bias = static_cast<float>(out[K]);
        s.w[K] = static_cast<double>(*bias);
    }
    if (sse) {
        // Residuals with the values as stored, as predictions will see them.
        // A row that fitted in one gather still has its block in s.x.
        const uint64_t begin = side.offsets[row], end = side.offsets[row + 1];
        double total = 0.0;
        if (end - begin <= kGatherRows) {
            total = residuals(s, K, side.biases, static_cast<uint32_t>(end - begin));
        } else {
            for (uint64_t at = begin; at < end; at += kGatherRows) {
                const uint32_t n = static_cast<uint32_t>(end - at < kGatherRows ? end - at : kGatherRows);
                gather(side, at, n, s);
                total = total + residuals(s, K, side.biases, n);
            }
        }
        *sse = total;
    }
    return true;
}

}  // namespace

#if CREDENCE_KERNEL_LEVEL == 2
extern const Table table_v4 = {kLevelName, conditional, draw_row};
#elif CREDENCE_KERNEL_LEVEL == 1
extern const Table table_v3 = {kLevelName, conditional, draw_row};
#else
extern const Table table_baseline = {kLevelName, conditional, draw_row};

// Chosen in the baseline build only, which every CPU runs.
const Table& table_for(CpuLevel level) {
    switch (static_cast<int>(level)) {
        case 0: return table_baseline;
#if CREDENCE_KERNEL_MAX_LEVEL >= 1
        case 1: return table_v3;
#endif
#if CREDENCE_KERNEL_MAX_LEVEL >= 2
        case 2: return table_v4;
#endif
        default: break;
    }
    throw std::invalid_argument("row kernels: no table for CPU level " + std::to_string(static_cast<int>(level)));
}
#endif

}  // namespace credence::row_kernels
