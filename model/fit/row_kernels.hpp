// The sampler's per-row kernels: the row draws, and the passes over all of a
// side's rows (the group moves' map, the hyperparameter and shift sums),
// compiled once per x86-64 level (model/math/cpu_level.hpp) and called through
// the table of the active level. Internal to model/fit.
//
// A row draw (model/fit/sampler.hpp for the model): gather the other side's
// factor rows of the row's ratings (float32 state, widened to double), sum
// the exact Gaussian conditional's statistics F = sum x x^T, s = sum x,
// t = sum y x, sum y and n, form the precision
//     P = prior_precision + tau [[F, s], [s^T, n]]     (the bias block only with biases)
// and rhs = prior_pm + tau [t; sum y], factor P = L L^T (Cholesky, double),
// and draw mean + L^-T z = L^-T (L^-1 rhs + z) for standard normals z, or,
// overrelaxed with coefficient a (Adler 1981; Neal 1998, section 2), from
// the row's current value x: mean + a (x - mean) + sqrt(1 - a^2) L^-T z =
// L^-T ((1 - a) L^-1 rhs + sqrt(1 - a^2) z) + a x. For any a in (-1, 1) that
// transition leaves the conditional N(mean, P^-1) invariant and is
// reversible with respect to it; a = 0 is the plain draw.
// Optionally the squared residuals of the row's ratings with the new row as
// stored (rounded to float32), for the noise precision's conditional,
// computed from the row's sums (sum y^2 - 2 w.[t; sum y] + w^T [[F, s],
// [s^T, n]] w with w the stored row) instead of a second pass.
//
// The precision P is the same bits at every level: every product summed into F
// and s is of two float32 values widened to double (or of one and 1.0), so it
// is exact in double, and a fused multiply-add rounds it exactly as a multiply
// then add does; each entry is summed over the ratings in rating order at
// every level (vector lanes run across entries, never across ratings). The
// right-hand side, the draws and the residuals are the same bits at x86-64-v3
// and v4, which fuse the multiply-adds of t (y is a double, so they round),
// the Cholesky factorization, the solves and the residuals' quadratic form
// (vectorized across independent entries only; the form's lanes are the 8
// positions of a panel at both levels, added in lane order); the baseline, for
// CPUs that may lack FMA, multiplies then adds, so its right-hand side and
// draws differ from theirs by rounding alone: within the bounds the
// conditional and draw tests state (the stored float32 row within 2^-24
// relative of the exact conditional mean plus L^-T z, the double solve adding
// at most d kappa(P) 2^-53). The map and the side sums run across outputs
// (each summed in row or column order as at the baseline), and the kernels are
// compiled with -ffp-contract=off, so the compiler fuses nothing the code does
// not. Whatever the level, the thread count never changes a bit.
// tests/model/fit/test_row_kernels.cpp checks all of it.
#pragma once
#include <cstddef>
#include <cstdint>

namespace credence {
enum class CpuLevel : int;  // model/math/cpu_level.hpp
}

namespace credence::row_kernels {

// One side's row pass as the kernels see it. Borrowed: every pointer must
// stay valid while the kernels run.
struct SideData {
    const uint64_t* offsets = nullptr;        // [rows + 1]: the ratings of row r are [offsets[r], offsets[r + 1])
    const uint32_t* index = nullptr;          // [nnz]: the other side's row of each rating
    const float* value = nullptr;             // [nnz]
    uint64_t nnz = 0;
    const float* other_factors = nullptr;     // [other rows][rank]
    const float* other_bias = nullptr;        // [other rows]; null without biases
    uint32_t rank = 0;
    bool biases = false;
    double global_mean = 0.0;
    double tau = 0.0;                         // noise precision
    const double* prior_precision = nullptr;  // [d][d] row-major, symmetric, d = rank + (biases ? 1 : 0)
    const double* prior_pm = nullptr;         // [d]: prior precision times prior mean
    double overrelax = 0.0;                   // a above, in (-1, 1); 0: the plain draw
    double overrelax_noise = 1.0;             // sqrt(1 - a^2), computed once by the caller
};

// Ratings gathered at once; a longer row is gathered in parts.
inline constexpr uint32_t kGatherRows = 2048;

// Doubles in a row's gathered factor block: rank rounded up to 8 (one
// 64-byte line per gathered rating). Always inlined: the kernel files are
// compiled once per level and must not share an out-of-line copy.
[[gnu::always_inline]] inline constexpr size_t padded(size_t n) { return (n + 7) / 8 * 8; }

// Rows gram_rows widens at once, and the scratch it needs for them.
inline constexpr uint32_t kGramChunkRows = 128;
[[gnu::always_inline]] inline constexpr size_t gram_scratch_doubles(uint32_t rank) {
    return size_t(kGramChunkRows) * padded(rank);
}

// Doubles of scratch one thread needs (for any level): allocate them
// 64-byte aligned and zero-filled once, then reuse for every row.
[[gnu::always_inline]] inline constexpr size_t scratch_doubles(uint32_t rank) {
    const size_t p = padded(rank), ld = padded(rank + 1);
    return kGatherRows * p + kGatherRows + rank * p + 2 * p + 2 * (rank + 1) * ld + 4 * ld;
}

struct Table {
    const char* level;  // cpu_level_name of the level it was compiled for

    // The row's conditional: writes precision[d][d] (row-major, both
    // triangles) and rhs[d]. Needs scratch as scratch_doubles(rank) says.
    void (*conditional)(const SideData& side, uint64_t row, double* scratch, double* precision, double* rhs);

    // Draws row `row` with normals[d] standard normals: writes factor[rank]
    // and, with biases, *bias, rounded to float32 (with side.overrelax != 0
    // their values on entry are the row's current value x); when sse is not null,
    // *sse = the row's sum of squared residuals with those stored values
    // (from the row's sums: within rounding, which can make it a tiny
    // negative number for a row that fits its ratings almost exactly).
    // Returns false, writing nothing but *smallest_diagonal (P's smallest
    // diagonal entry), when P is not positive definite or the draw is not
    // finite.
    bool (*draw_row)(const SideData& side, uint64_t row, const double* normals, double* scratch, float* factor,
                     float* bias, double* sse, double* smallest_diagonal);

    // The group moves' factor-space map (model/fit/group_moves.cpp) of
    // `count` rows of `rank` floats in place: row <- A row, each output
    // summed in double in column order (0 + A[k][0] x[0] + A[k][1] x[1] + ...)
    // and rounded once to float. A is column-major with columns `stride`
    // doubles apart (stride = padded(rank), entries past rank zero); out is
    // scratch of stride doubles. Borrows everything.
    void (*map_rows)(float* rows, uint64_t count, uint32_t rank, const double* map, size_t stride, double* out);

    // Sums over `count` rows of `rank` floats, in row order, for the
    // hyperparameters' statistics and the group moves' shift conditionals:
    // with d = row - center (center null: d = row), lower[j][k] += d[j] d[k]
    // for k <= j (rows of lower `stride` = padded(rank) doubles apart; the
    // entries right of j up to the end of the 8-column panel holding column
    // j are written too, finite, never a result), and when cross is not
    // null, cross[k] += weights[r] d[k] (cross has stride doubles). Each
    // entry is a multiply then an add per row, so every level gives the same
    // bits. d is scratch of gram_scratch_doubles(rank). Borrows everything;
    // the caller zeroes lower and cross first.
    void (*gram_rows)(const float* rows, uint64_t count, uint32_t rank, const double* center, const float* weights,
                      size_t stride, double* lower, double* cross, double* d);
};

// One table per compiled level (the v3 and v4 tables exist only when
// CMake compiled those levels; model/fit/gibbs_sweep.cpp picks one).
extern const Table table_baseline;
extern const Table table_v3;
extern const Table table_v4;

// The table for `level`: needs a level this build compiled and this CPU
// runs (detected_cpu_level() and below); std::invalid_argument otherwise.
const Table& table_for(CpuLevel level);

}  // namespace credence::row_kernels
