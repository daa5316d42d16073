// Tests for the sampler's row kernels (model/fit/row_kernels): every CPU
// level this machine runs forms the same conditional precision bit for bit, the FMA
// levels give the same bits as each other (right-hand side, draws, residuals, whole sweeps at
// any thread count) and every level the same bits at any thread count, the
// draws at every level agree with the exact conditional within rounding, the conditional agrees
// with a long-double reference within its rounding bound, a draw is the
// conditional mean plus L^-T z, and a precision that is not positive
// definite is reported.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstdlib>
#include <cstring>
#include <utility>
#include <vector>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/row_kernels.hpp"
#include "model/fit/sparse.hpp"
#include "model/math/cpu_level.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

constexpr double kUnit = 0x1.0p-53;  // unit roundoff of double

// Higham, Accuracy and Stability of Numerical Algorithms (2nd ed.), section 3.1.
double gamma_n(double n) { return n * kUnit / (1.0 - n * kUnit); }

struct AlignedScratch {
    double* data;
    explicit AlignedScratch(uint32_t rank) {
        const size_t bytes = (row_kernels::scratch_doubles(rank) * sizeof(double) + 63) / 64 * 64;
        data = static_cast<double*>(std::aligned_alloc(64, bytes));
        std::memset(data, 0, bytes);
    }
    ~AlignedScratch() { std::free(data); }
};

// Restores the active level however a test ends.
struct LevelGuard {
    CpuLevel saved = active_cpu_level();
    ~LevelGuard() { set_cpu_level(saved); }
};

// Ratings with rows of every kind: empty rows are impossible (ids come from
// ratings), short rows, and with `long_rows` a side whose rows are longer
// than one gather (row_kernels::kGatherRows).
RatingSet ratings_for(bool long_rows) {
    SimulationOptions so;
    if (long_rows) {
        so.users = row_kernels::kGatherRows + 300;
        so.items = 3;
        so.density = 1.0;
    } else {
        so.users = 50;
        so.items = 30;
        so.density = 0.3;
    }
    so.rank = 3;
    so.bias_sd = 0.3;
    so.seed = 17;
    return simulate_ratings(so).ratings;
}

// A random symmetric positive definite prior precision (diagonally dominant).
Eigen::MatrixXd random_prior(Eigen::Index d, uint64_t seed) {
    Rng rng(seed);
    Eigen::MatrixXd a(d, d);
    for (Eigen::Index i = 0; i < d; ++i)
        for (Eigen::Index j = 0; j <= i; ++j) a(i, j) = a(j, i) = 0.3 * rng.normal();
    for (Eigen::Index i = 0; i < d; ++i) a(i, i) = std::abs(a(i, i)) + 0.5 * double(d);
    return a;
}

struct Side {
    Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor> prior;
    Eigen::VectorXd pm;
    row_kernels::SideData data;
};

Side make_side(const CsrMatrix& csr, const GibbsState& st, bool by_user, uint32_t rank, bool biases, double g) {
    Side s;
    const Eigen::Index d = rank + (biases ? 1 : 0);
    s.prior = random_prior(d, 5 + rank);
    Rng rng(9);
    s.pm.resize(d);
    for (Eigen::Index i = 0; i < d; ++i) s.pm[i] = rng.normal();
    auto& o = s.data;
    o.offsets = csr.offsets.data();
    o.index = csr.index.data();
    o.value = csr.value.data();
    o.nnz = csr.nnz();
    o.other_factors = by_user ? st.item_factors.data() : st.user_factors.data();
    o.other_bias = biases ? (by_user ? st.item_bias.data() : st.user_bias.data()) : nullptr;
    o.rank = rank;
    o.biases = biases;
    o.global_mean = g;
    o.tau = 1.7;
    o.prior_precision = s.prior.data();
    o.prior_pm = s.pm.data();
    return s;
}

// The gathered row as the model defines it: x = [f; 1] (the 1 with biases)
// and y = r - g - other bias, in long double.
void gathered(const row_kernels::SideData& side, uint64_t at, std::vector<long double>& x, long double& y) {
    const uint32_t other = side.index[at];
    x.assign(side.rank + (side.biases ? 1 : 0), 1.0L);
    for (uint32_t k = 0; k < side.rank; ++k) x[k] = side.other_factors[size_t(other) * side.rank + k];
    y = static_cast<long double>(static_cast<double>(side.value[at]) - side.global_mean);
    if (side.biases) y = static_cast<long double>(static_cast<double>(y) - double(side.other_bias[other]));
}

// The simulated ratings (ratings_for) in both row layouts, as the sampler
// sees them. Holds pointers into itself: built in place, never copied.
struct SimulatedRatings {
    RatingSet ratings;
    CsrMatrix by_user, by_item;
    GibbsData data;

    explicit SimulatedRatings(bool long_rows)
        : ratings(ratings_for(long_rows)),
          by_user(csr_by_user(ratings)),
          by_item(csr_by_item(ratings)),
          data{&by_user, &by_item, ratings.mean()} {}
    SimulatedRatings(const SimulatedRatings&) = delete;
    SimulatedRatings& operator=(const SimulatedRatings&) = delete;
};

// The set-up of the tests of single rows: the simulated ratings, a start
// state (initial_state, seed 3, chain 0) under `options`, and the user or
// item side's kernel input with biases (make_side), with scratch.
struct RowFixture : SimulatedRatings {
    FitOptions options;
    GibbsState state;
    Side side;
    size_t d;  // the row dimension, rank + 1
    AlignedScratch scratch;

    RowFixture(const FitOptions& o, bool user_side, bool long_rows = false)
        : SimulatedRatings(long_rows),
          options(o),
          state(initial_state(data, options, 3, 0)),
          side(make_side(user_side ? by_user : by_item, state, user_side, options.rank, true, data.global_mean)),
          d(options.rank + 1),
          scratch(options.rank) {}
    RowFixture(const RowFixture&) = delete;
    RowFixture& operator=(const RowFixture&) = delete;
};

// The conditional of `row` as `kernels` form it, solved in double by Eigen:
// what the draws are checked against.
struct SolvedConditional {
    Eigen::VectorXd mean;        // P^-1 rhs
    Eigen::MatrixXd covariance;  // P^-1
};

SolvedConditional solve_conditional(const row_kernels::Table& kernels, RowFixture& f, uint32_t row) {
    std::vector<double> pv(f.d * f.d), rv(f.d);
    kernels.conditional(f.side.data, row, f.scratch.data, pv.data(), rv.data());
    const Eigen::Map<const Eigen::MatrixXd> p(pv.data(), Eigen::Index(f.d), Eigen::Index(f.d));
    const Eigen::Map<const Eigen::VectorXd> rhs(rv.data(), Eigen::Index(f.d));
    return {p.llt().solve(rhs), p.inverse()};
}

// Draws `row` with the normals z from `start` (the factor entries, then the
// bias; read only by an overrelaxed draw) and returns the row as stored,
// widened to double. The draw must succeed (REQUIRE).
Eigen::VectorXd stored_draw(const row_kernels::Table& kernels, RowFixture& f, uint32_t row,
                            const std::vector<double>& z, const std::vector<float>& start) {
    const uint32_t rank = f.options.rank;
    std::vector<float> factor(start.begin(), start.begin() + rank);
    float bias = start[rank];
    double smallest = 0.0;
    REQUIRE(kernels.draw_row(f.side.data, row, z.data(), f.scratch.data, factor.data(), &bias, nullptr, &smallest));
    Eigen::VectorXd out(f.d);
    for (size_t k = 0; k < rank; ++k) out[k] = factor[k];
    out[rank] = bias;
    return out;
}

}  // namespace

TEST_CASE("every CPU level forms the same precision, the FMA levels the same right-hand side, all within rounding of a long-double reference") {
    for (const bool long_rows : {false, true}) {
        const SimulatedRatings sim(long_rows);
        // Ranks below, at and past the 8-double panels, with and without biases.
        for (const uint32_t rank : {3u, 8u, 16u, 17u}) {
            for (const bool biases : {true, false}) {
                FitOptions o;
                o.rank = rank;
                o.biases = biases;
                o.init_scale = 0.7;
                const GibbsState st = initial_state(sim.data, o, 3, 0);
                for (const bool user_side : {true, false}) {
                    const CsrMatrix& csr = user_side ? sim.by_user : sim.by_item;
                    const Side side = make_side(csr, st, user_side, rank, biases, sim.data.global_mean);
                    const size_t d = rank + (biases ? 1 : 0);
                    AlignedScratch scratch(rank);
                    for (uint32_t row = 0; row < csr.num_rows; row += std::max(1u, csr.num_rows / 5)) {
                        // P is the same bits at every level; rhs at the FMA levels
                        // (which fuse t's multiply-adds), and every level's rhs is
                        // checked against the reference below.
                        std::vector<double> p0(d * d), r0(d);
                        row_kernels::table_baseline.conditional(side.data, row, scratch.data, p0.data(), r0.data());
                        std::vector<std::vector<double>> rhs_by_level;
                        std::vector<double> r_fma;
                        for (CpuLevel level : supported_cpu_levels()) {
                            std::vector<double> p(d * d), r(d);
                            row_kernels::table_for(level).conditional(side.data, row, scratch.data, p.data(), r.data());
                            INFO("level " << cpu_level_name(level) << " rank " << rank << " row " << row);
                            CHECK(std::memcmp(p.data(), p0.data(), d * d * sizeof(double)) == 0);
                            if (level != CpuLevel::baseline) {
                                if (r_fma.empty()) r_fma = r;
                                CHECK(std::memcmp(r.data(), r_fma.data(), d * sizeof(double)) == 0);
                            }
                            rhs_by_level.push_back(r);
                        }
                        // Reference: P = prior + tau sum x x^T, rhs = pm + tau sum y x,
                        // in long double. Each double entry is a sum of n + 2 rounded
                        // terms, so within gamma_{n+2} times the sum of the terms'
                        // magnitudes (Higham, section 3.1), twice for the product by tau.
                        const uint64_t begin = csr.offsets[row], end = csr.offsets[row + 1];
                        const double n = double(end - begin);
                        std::vector<long double> pr(d * d, 0.0L), pa(d * d, 0.0L), rr(d, 0.0L), ra(d, 0.0L);
                        std::vector<long double> x;
                        long double y;
                        for (uint64_t at = begin; at < end; ++at) {
                            gathered(side.data, at, x, y);
                            for (size_t i = 0; i < d; ++i) {
                                rr[i] += y * x[i];
                                ra[i] += std::abs(y * x[i]);
                                for (size_t j = 0; j < d; ++j) {
                                    pr[i * d + j] += x[i] * x[j];
                                    pa[i * d + j] += std::abs(x[i] * x[j]);
                                }
                            }
                        }
                        const long double tau = side.data.tau;
                        for (size_t i = 0; i < d; ++i) {
                            for (size_t j = 0; j < d; ++j) {
                                const long double exact = side.prior(i, j) + tau * pr[i * d + j];
                                const double bound =
                                    gamma_n(n + 3) * double(std::abs(side.prior(i, j)) + tau * pa[i * d + j]);
                                CHECK(double(std::abs(p0[i * d + j] - exact)) <= bound);
                            }
                            const long double exact = side.pm[i] + tau * rr[i];
                            for (const auto& r : rhs_by_level)
                                CHECK(double(std::abs(r[i] - exact)) <=
                                      gamma_n(n + 4) * double(std::abs(side.pm[i]) + tau * ra[i]));
                        }
                    }
                }
            }
        }
    }
}

TEST_CASE("a row draw is the conditional mean plus L^-T z, up to the float32 rounding of the stored row") {
    // At every level, so this is also the bound within which the baseline
    // (multiply then add) and the FMA levels (fused) agree. Rank 5 takes the
    // run-time-sized kernels, 2, 4, 8, 16 and 32 the fixed-size ones.
    for (const uint32_t rank : {2u, 4u, 5u, 8u, 16u, 32u}) {
        RowFixture f({.rank = rank, .init_scale = 0.7}, true);
        const size_t d = f.d;
        const std::vector<float> unread(d, 0.0f);  // a plain draw ignores the row's current value
        for (CpuLevel level : supported_cpu_levels()) {
            const auto& kernels = row_kernels::table_for(level);
            for (uint32_t row = 0; row < 5; ++row) {
                const auto [mean, cov] = solve_conditional(kernels, f, row);
                // Draws with z = 0 (the mean) and z = scale e_k (the mean plus
                // scale times column k of L^-T). Stored as float32: each entry
                // within 2^-24 of its magnitude; the double solve adds at most
                // d kappa(P) 2^-53 relative (Higham, Theorem 10.4 and section 7.1),
                // far below that here (kappa < 100; 1e-11 allows for it).
                const double scale = 1000.0;
                Eigen::MatrixXd deviations(d, d);
                std::vector<double> z(d, 0.0);
                const Eigen::VectorXd at_zero = stored_draw(kernels, f, row, z, unread);
                for (size_t k = 0; k < d; ++k)
                    CHECK(std::abs(at_zero[k] - mean[k]) <= 0x1.0p-24 * std::abs(mean[k]) + 1e-11 * (1.0 + mean.norm()));
                for (size_t k = 0; k < d; ++k) {
                    std::fill(z.begin(), z.end(), 0.0);
                    z[k] = scale;
                    deviations.col(Eigen::Index(k)) = (stored_draw(kernels, f, row, z, unread) - mean) / scale;
                }
                // Columns of L^-T: D D^T = L^-T L^-1 = P^-1. Each stored entry
                // is off by at most 2^-24 |x| / scale + |mean error| / scale, so
                // each product entry by at most 2 d max|D| max(err); 4x margin.
                const double entry_error = (0x1.0p-24 * (mean.cwiseAbs().maxCoeff() + scale * deviations.cwiseAbs().maxCoeff()) +
                                            1e-11 * (1.0 + mean.norm())) / scale;
                const double tolerance = 4.0 * 2.0 * double(d) * deviations.cwiseAbs().maxCoeff() * entry_error;
                CHECK((deviations * deviations.transpose() - cov).cwiseAbs().maxCoeff() <= tolerance);
            }
        }
    }
}

// The overrelaxed transition of Adler (1981) (Neal 1998, eq. 2 is the same
// update per coordinate): from the current value x, mean + a (x - mean) +
// sqrt(1 - a^2) L^-T z, which keeps N(mean, P^-1) invariant. Checked as
// above: z = 0 gives the deterministic part, z = scale e_k minus that gives
// columns D with D D^T = (1 - a^2) P^-1. Tolerances as in the case above,
// with the start x (up to 3 in size) adding its float32 rounding.
TEST_CASE("an overrelaxed row draw steps past the mean by a times the current offset and shrinks the noise by sqrt(1 - a^2)") {
    for (const uint32_t rank : {5u, 8u}) {  // the run-time-sized kernels and a fixed-size one
        RowFixture f({.rank = rank, .init_scale = 0.7}, true);
        const double a = -0.7;
        f.side.data.overrelax = a;
        f.side.data.overrelax_noise = std::sqrt(1.0 - a * a);
        const size_t d = f.d;
        Rng start_rng(17);
        for (CpuLevel level : supported_cpu_levels()) {
            const auto& kernels = row_kernels::table_for(level);
            for (uint32_t row = 0; row < 5; ++row) {
                const auto [mean, cov] = solve_conditional(kernels, f, row);
                std::vector<float> x0(d);
                for (float& v : x0) v = static_cast<float>(start_rng.normal());
                auto draw = [&](const std::vector<double>& z) { return stored_draw(kernels, f, row, z, x0); };
                std::vector<double> z(d, 0.0);
                const Eigen::VectorXd at_zero = draw(z);
                const double x_size = Eigen::Map<const Eigen::VectorXf>(x0.data(), Eigen::Index(d)).cwiseAbs().maxCoeff();
                for (size_t k = 0; k < d; ++k) {
                    const double expected = mean[k] + a * (double(x0[k]) - mean[k]);
                    CHECK(std::abs(at_zero[k] - expected) <=
                          0x1.0p-24 * (std::abs(expected) + 2.0 * x_size) + 1e-11 * (1.0 + mean.norm() + x_size));
                }
                const double scale = 1000.0;
                Eigen::MatrixXd deviations(d, d);
                for (size_t k = 0; k < d; ++k) {
                    std::fill(z.begin(), z.end(), 0.0);
                    z[k] = scale;
                    deviations.col(Eigen::Index(k)) = (draw(z) - at_zero) / scale;
                }
                const double entry_error =
                    (0x1.0p-24 * (2.0 * at_zero.cwiseAbs().maxCoeff() + scale * deviations.cwiseAbs().maxCoeff()) +
                     1e-11 * (1.0 + mean.norm() + x_size)) / scale;
                const double tolerance = 4.0 * 2.0 * double(d) * deviations.cwiseAbs().maxCoeff() * entry_error;
                CHECK((deviations * deviations.transpose() - (1.0 - a * a) * cov).cwiseAbs().maxCoeff() <= tolerance);
            }
        }
    }
}

TEST_CASE("the FMA levels give bit-identical sweeps, and every level the same bits at one thread and at two") {
    // x86-64-v3 and v4 fuse the same multiply-adds, so they agree bit for
    // bit with each other; the baseline does not fuse, so it is compared
    // with itself across thread counts here, and with the exact conditional
    // (within rounding) by the draw tests above.
    const LevelGuard guard;
    for (const bool long_rows : {false, true}) {
        const SimulatedRatings sim(long_rows);
        // 5 takes the run-time-sized kernels; 4, 8, 16 and 32 the fixed-size ones.
        for (const uint32_t rank : {4u, 5u, 8u, 16u, 32u}) {
            for (const bool biases : {true, false}) {
                FitOptions o;
                o.rank = rank;
                o.biases = biases;
                auto run = [&](CpuLevel level, int threads) {
                    set_cpu_level(level);
                    GibbsState st = initial_state(sim.data, o, 21, 1);
                    for (uint32_t sweep = 0; sweep < 3; ++sweep)
                        gibbs_sweep(sim.data, o, SweepKey{21, 1, sweep}, st, threads);
                    return st;
                };
                const GibbsState baseline_reference = run(CpuLevel::baseline, 1);
                const bool fma = detected_cpu_level() >= CpuLevel::v3;
                const GibbsState fma_reference = fma ? run(CpuLevel::v3, 1) : baseline_reference;
                for (CpuLevel level : supported_cpu_levels()) {
                    const GibbsState& reference = level == CpuLevel::baseline ? baseline_reference : fma_reference;
                    for (int threads : {1, 2}) {
                        INFO("level " << cpu_level_name(level) << ", " << threads << " thread(s), rank " << rank
                                      << (biases ? ", biases" : ", no biases"));
                        const GibbsState st = run(level, threads);
                        CHECK(st.user_factors == reference.user_factors);
                        CHECK(st.item_factors == reference.item_factors);
                        CHECK(st.user_bias == reference.user_bias);
                        CHECK(st.item_bias == reference.item_bias);
                        CHECK(st.sse == reference.sse);
                        CHECK(st.noise_precision == reference.noise_precision);
                    }
                }
            }
        }
    }
}

TEST_CASE("the residuals a draw returns are the squared errors of the row as stored") {
    // Rank 6 takes the run-time-sized kernels, 16 a fixed-size one (two panels).
    for (const auto& [long_rows, rank] :
         {std::pair{false, 6u}, std::pair{true, 6u}, std::pair{false, 16u}, std::pair{true, 16u}}) {
        RowFixture fixture({.rank = rank, .init_scale = 0.7}, false, long_rows);
        const FitOptions& o = fixture.options;
        const CsrMatrix& by_item = fixture.by_item;
        const Side& side = fixture.side;
        AlignedScratch& scratch = fixture.scratch;
        std::vector<double> z(o.rank + 1, 0.3);
        for (CpuLevel level : supported_cpu_levels()) {
            for (uint32_t row = 0; row < by_item.num_rows; row += std::max(1u, by_item.num_rows / 4)) {
                std::vector<float> f(o.rank);
                float b = 0.0f;
                double sse = -1.0, smallest = 0.0;
                REQUIRE(row_kernels::table_for(level).draw_row(side.data, row, z.data(), scratch.data, f.data(), &b,
                                                               &sse, &smallest));
                // Reference in long double. The kernel expands the sum of squares
                // into sum y^2, w.t, w.s and w^T F w, each term of which passes
                // through at most n (the sums over ratings) + rank + 20 (the
                // products, the sums over entries and lanes, the final
                // combination) roundings, so the result is within
                // gamma_{n + rank + 20} of the sum of the terms' magnitudes,
                // which the magnitude below bounds (Higham 3.1).
                long double exact = 0.0L, magnitude = 0.0L;
                std::vector<long double> x;
                long double y;
                for (uint64_t at = by_item.offsets[row]; at < by_item.offsets[row + 1]; ++at) {
                    gathered(side.data, at, x, y);
                    long double prediction = b, size = std::abs(static_cast<long double>(b));
                    for (uint32_t k = 0; k < o.rank; ++k) {
                        prediction += x[k] * f[k];
                        size += std::abs(x[k] * f[k]);
                    }
                    exact += (y - prediction) * (y - prediction);
                    magnitude += (std::abs(y) + size) * (std::abs(y) + size);
                }
                const double n = double(by_item.row_size(row));
                CHECK(double(std::abs(sse - exact)) <= gamma_n(n + o.rank + 20) * double(magnitude));
            }
        }
    }
}

TEST_CASE("the side sums are the same bits at every level and within rounding of a long-double reference") {
    // 300 rows: two whole chunks of row_kernels::kGramChunkRows and a part.
    // Each entry of lower and cross is a sum of 300 rounded products of
    // rounded differences, so within gamma_{n + 2} of the sum of the terms'
    // magnitudes (Higham, section 3.1).
    const uint32_t n = 300;
    for (const uint32_t rank : {5u, 16u, 17u, 32u}) {
        Rng rng(40 + rank);
        std::vector<float> rows(size_t(n) * rank), weights(n);
        for (float& v : rows) v = static_cast<float>(rng.normal());
        for (float& v : weights) v = static_cast<float>(rng.normal());
        std::vector<double> center(rank);
        for (double& v : center) v = 0.1 * rng.normal();
        const size_t stride = row_kernels::padded(rank);
        std::vector<double> lower0, cross0;
        for (CpuLevel level : supported_cpu_levels()) {
            INFO("level " << cpu_level_name(level) << " rank " << rank);
            std::vector<double> lower(size_t(rank) * stride, 0.0), cross(stride, 0.0);
            std::vector<double> scratch(row_kernels::gram_scratch_doubles(rank));
            row_kernels::table_for(level).gram_rows(rows.data(), n, rank, center.data(), weights.data(), stride,
                                                    lower.data(), cross.data(), scratch.data());
            if (lower0.empty()) {
                lower0 = lower;
                cross0 = cross;
            }
            for (uint32_t j = 0; j < rank; ++j) {
                for (uint32_t k = 0; k <= j; ++k) CHECK(lower[size_t(j) * stride + k] == lower0[size_t(j) * stride + k]);
                CHECK(cross[j] == cross0[j]);
            }
        }
        for (uint32_t j = 0; j < rank; ++j) {
            long double cross_exact = 0.0L, cross_size = 0.0L;
            for (uint32_t k = 0; k <= j; ++k) {
                long double exact = 0.0L, size = 0.0L;
                for (uint32_t r = 0; r < n; ++r) {
                    const long double dj = static_cast<long double>(rows[size_t(r) * rank + j]) - center[j];
                    const long double dk = static_cast<long double>(rows[size_t(r) * rank + k]) - center[k];
                    exact += dj * dk;
                    size += std::abs(dj * dk);
                }
                CHECK(double(std::abs(lower0[size_t(j) * stride + k] - exact)) <= gamma_n(n + 2) * double(size));
            }
            for (uint32_t r = 0; r < n; ++r) {
                const long double dj = static_cast<long double>(rows[size_t(r) * rank + j]) - center[j];
                cross_exact += weights[r] * dj;
                cross_size += std::abs(weights[r] * dj);
            }
            CHECK(double(std::abs(cross0[j] - cross_exact)) <= gamma_n(n + 2) * double(cross_size));
        }
    }
}

TEST_CASE("a precision that is not positive definite is reported with its smallest diagonal at every level") {
    RowFixture fixture({.rank = 4}, true);
    const FitOptions& o = fixture.options;
    Side& side = fixture.side;
    AlignedScratch& scratch = fixture.scratch;
    side.prior(2, 2) = -1e6;  // no data can lift it
    std::vector<double> z(o.rank + 1, 0.0);
    for (CpuLevel level : supported_cpu_levels()) {
        std::vector<float> f(o.rank, 42.0f);
        float b = 42.0f;
        double smallest = 0.0;
        CHECK_FALSE(row_kernels::table_for(level).draw_row(side.data, 0, z.data(), scratch.data, f.data(), &b, nullptr,
                                                           &smallest));
        CHECK(smallest < -9e5);
        CHECK(f[0] == 42.0f);  // nothing written
        CHECK(b == 42.0f);
    }
}

TEST_CASE("the CPU level cannot be set above what this CPU runs") {
    const LevelGuard guard;
    for (CpuLevel level : supported_cpu_levels()) {
        set_cpu_level(level);
        CHECK(active_cpu_level() == level);
        CHECK(std::string(row_kernels::table_for(level).level) == cpu_level_name(level));
    }
    if (detected_cpu_level() < CpuLevel::v4) CHECK_THROWS_AS(set_cpu_level(CpuLevel::v4), OptionError);
    CHECK(std::string(cpu_level_name(CpuLevel::v3)) == "x86-64-v3");
}
