#include "model/fit/group_moves.hpp"

#include <omp.h>

#include <algorithm>
#include <cmath>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/math/cpu_level.hpp"
#include "model/math/distributions.hpp"
#include "model/fit/row_kernels.hpp"

namespace credence {

namespace {

enum MoveRow : uint64_t { user_shift = 0, item_shift = 1, bias_shift = 2, factor_space = 3 };

// Rows summed per block by the passes below. The blocks are fixed whatever
// the thread count, each is summed in row order and the blocks' sums are
// added in block order, so every sum has the same bits on any team.
constexpr size_t kBlockRows = 1024;

int team_size(int threads) { return threads > 0 ? threads : omp_get_max_threads(); }

// lower[j][k] (k <= j; row-major K x K) = sum_r w_r[j] w_r[k] and
// cw[k] = sum_r c_r w_r[k] over the rows of w ([rows][K] float32), in double.
void weighted_gram(const float* w, const float* c, size_t rows, uint32_t K, int threads, std::vector<double>& lower,
                   std::vector<double>& cw) {
    const size_t blocks = (rows + kBlockRows - 1) / kBlockRows, kk = size_t(K) * K;
    const size_t stride = row_kernels::padded(K);
    const row_kernels::Table& kernels = row_kernels::table_for(active_cpu_level());
    std::vector<double> partial(blocks * (kk + K), 0.0);
#pragma omp parallel num_threads(team_size(threads))
    {
        // Each block's sums by the row kernels (every entry summed in row
        // order, the same bits at every level) in padded buffers, then copied.
        std::vector<double> d(row_kernels::gram_scratch_doubles(K)), padded(size_t(K) * stride), cross(stride);
#pragma omp for schedule(dynamic, 1)
        for (size_t b = 0; b < blocks; ++b) {
            double* g = partial.data() + b * (kk + K);
            double* h = g + kk;
            const size_t first = b * kBlockRows, end = std::min(rows, first + kBlockRows);
            std::fill(padded.begin(), padded.end(), 0.0);
            std::fill(cross.begin(), cross.end(), 0.0);
            kernels.gram_rows(w + first * K, end - first, K, nullptr, c + first, stride, padded.data(), cross.data(),
                              d.data());
            for (uint32_t j = 0; j < K; ++j)
                for (uint32_t k = 0; k <= j; ++k) g[size_t(j) * K + k] = padded[size_t(j) * stride + k];
            for (uint32_t k = 0; k < K; ++k) h[k] = cross[k];
        }
    }
    lower.assign(kk, 0.0);
    cw.assign(K, 0.0);
    for (size_t b = 0; b < blocks; ++b) {
        const double* g = partial.data() + b * (kk + K);
        for (size_t i = 0; i < kk; ++i) lower[i] += g[i];
        for (uint32_t k = 0; k < K; ++k) cw[k] += g[kk + k];
    }
}

// The shift of `moved` factors against the other side's biases: d ~ Normal
// with precision beta0 Lambda + lambda sum_j W_j W_j^T (W = the other side's
// factors) and precision-mean -beta0 Lambda mu + lambda sum_j c_j W_j.
ShiftConditional shift_conditional(const Eigen::VectorXd& mu, const Eigen::MatrixXd& lambda,
                                   const FactorRows& other_factors, const std::vector<float>& compensated,
                                   double bias_precision, double beta0, uint32_t rank, int threads) {
    std::vector<double> lower, cw;
    weighted_gram(other_factors.data(), compensated.data(), compensated.size(), rank, threads, lower, cw);
    ShiftConditional out;
    out.precision = beta0 * lambda;
    for (uint32_t j = 0; j < rank; ++j)
        for (uint32_t k = 0; k <= j; ++k) {
            const double v = bias_precision * lower[size_t(j) * rank + k];
            out.precision(j, k) += v;
            if (k != j) out.precision(k, j) += v;
        }
    out.precision_mean = -beta0 * (lambda * mu);
    for (uint32_t k = 0; k < rank; ++k) out.precision_mean[k] += bias_precision * cw[k];
    return out;
}

// moved[r] += d (every row), mu += d, compensated[j] -= d . other_factors[j].
void shift_side(FactorRows& moved, Eigen::VectorXd& mu, const FactorRows& other_factors,
                std::vector<float>& compensated, uint32_t rank, const Eigen::VectorXd& d, int threads) {
    const auto rows = static_cast<int64_t>(moved.size() / rank);
    const auto others = static_cast<int64_t>(compensated.size());
    std::vector<float> step(rank);
    for (uint32_t k = 0; k < rank; ++k) step[k] = static_cast<float>(d[k]);
    const double* dd = d.data();
    float* m = moved.data();
    const float* w = other_factors.data();
    float* c = compensated.data();
#pragma omp parallel num_threads(team_size(threads))
    {
#pragma omp for schedule(dynamic, 1024) nowait
        for (int64_t r = 0; r < rows; ++r)
            for (uint32_t k = 0; k < rank; ++k) m[r * rank + k] += step[k];
#pragma omp for schedule(dynamic, 1024) nowait
        for (int64_t j = 0; j < others; ++j) {
            const float* row = w + j * rank;
            double dot = 0.0;
            for (uint32_t k = 0; k < rank; ++k) dot += double(row[k]) * dd[k];
            c[j] = static_cast<float>(double(c[j]) - dot);
        }
    }
    mu += d;
}

// The map of a factor space, column-major with columns padded to
// row_kernels::padded(K) doubles (zero past K), as row_kernels::map_rows takes it.
std::vector<double> padded_columns(const Eigen::MatrixXd& map) {
    const auto K = static_cast<size_t>(map.rows());
    const size_t stride = row_kernels::padded(K);
    std::vector<double> out(K * stride, 0.0);
    for (size_t m = 0; m < K; ++m)
        for (size_t k = 0; k < K; ++k) out[m * stride + k] = map(static_cast<Eigen::Index>(k), static_cast<Eigen::Index>(m));
    return out;
}

}  // namespace

// ---- the shifts along the bias ridges

ShiftConditional user_shift_conditional(const FitOptions& o, const GibbsState& st, int threads) {
    return shift_conditional(st.user_mu, st.user_lambda, st.item_factors, st.item_bias, st.item_bias_precision,
                             o.prior.beta0, st.rank, threads);
}

ShiftConditional item_shift_conditional(const FitOptions& o, const GibbsState& st, int threads) {
    return shift_conditional(st.item_mu, st.item_lambda, st.user_factors, st.user_bias, st.user_bias_precision,
                             o.prior.beta0, st.rank, threads);
}

void shift_users(GibbsState& st, const Eigen::VectorXd& d, int threads) {
    shift_side(st.user_factors, st.user_mu, st.item_factors, st.item_bias, st.rank, d, threads);
}

void shift_items(GibbsState& st, const Eigen::VectorXd& e, int threads) {
    shift_side(st.item_factors, st.item_mu, st.user_factors, st.user_bias, st.rank, e, threads);
}

ShiftConditional bias_shift_conditional(const GibbsState& st) {
    double sum_b = 0.0, sum_c = 0.0;
    for (float b : st.user_bias) sum_b += b;
    for (float c : st.item_bias) sum_c += c;
    ShiftConditional out;
    out.precision = Eigen::MatrixXd::Constant(1, 1, st.user_bias_precision * double(st.user_bias.size()) +
                                                        st.item_bias_precision * double(st.item_bias.size()));
    out.precision_mean = Eigen::VectorXd::Constant(1, -st.user_bias_precision * sum_b + st.item_bias_precision * sum_c);
    return out;
}

void shift_biases(GibbsState& st, double a) {
    for (float& b : st.user_bias) b = static_cast<float>(double(b) + a);
    for (float& c : st.item_bias) c = static_cast<float>(double(c) - a);
}

Eigen::VectorXd draw_shift(const ShiftConditional& conditional, Rng& rng, const SweepKey& key, const char* move) {
    try {
        return draw_normal_from_precision(rng, Eigen::LLT<Eigen::MatrixXd>(conditional.precision).solve(conditional.precision_mean),
                                          conditional.precision);
    } catch (const NumericError& e) {
        throw NumericError("sampler: chain " + std::to_string(key.chain) + ", sweep " + std::to_string(key.sweep) +
                           ", " + move + " shift: " + e.what());
    }
}

// ---- the maps of the factor space
//
// The factor-space maps U_u -> A U_u, V_i -> A^-T V_i (with mu_U -> A mu_U,
// Lambda_U -> A^-T Lambda_U A^-1, mu_V -> A^-T mu_V, Lambda_V -> A Lambda_V
// A^T) leave the likelihood and every prediction unchanged. With W0 = w I,
// every Jacobian and determinant cancels, and A's density with respect to the
// Haar measure of GL(K) is
//   exp(-tr(Lambda_U A^-1 A^-T) / 2w - tr(Lambda_V A^T A) / 2w).
// Random-scan over one-parameter subgroups that generate GL+(K):
//   scaling of coordinate k (A = I + (s - 1) e_k e_k^T): t = s^2 has density
//     t^-1 exp(-(Lambda_U,kk / t + Lambda_V,kk t) / 2w), a generalized inverse
//     Gaussian with index 0; log(t / eta) has density ~ exp(-omega cosh y),
//     eta = sqrt(Lambda_U,kk / Lambda_V,kk), omega = sqrt(Lambda_U,kk Lambda_V,kk) / w.
//   shear (A = I + c e_i e_j^T, i != j): c ~ Normal with precision
//     (Lambda_U,ii + Lambda_V,jj) / w and mean (Lambda_U,ij - Lambda_V,ij) /
//     (Lambda_U,ii + Lambda_V,jj).

ScaleConditional scale_conditional(const FitOptions& o, const GibbsState& st, uint32_t k) {
    const double lu = st.user_lambda(k, k), lv = st.item_lambda(k, k);
    return {0.5 * std::log(lu / lv), std::sqrt(lu * lv) / o.prior.w0_scale};
}

// Exact: rejection from Normal(0, 1/omega), since cosh y >= 1 + y^2/2 (the
// Taylor series of cosh has no negative terms), accepting with probability
// exp(-omega (cosh y - 1 - y^2/2)). Acceptance is 0.91 at omega = 1 and 0.38
// at omega = 0.01 (ratio of the normalizers 2 K_0(omega) and
// exp(-omega) sqrt(2 pi / omega)).
double draw_log_symmetric_gig(Rng& rng, double omega) {
    const double sd = 1.0 / std::sqrt(omega);
    for (;;) {
        const double y = sd * rng.normal();
        const double excess = omega * (std::cosh(y) - 1.0 - 0.5 * y * y);
        if (std::log(rng.uniform()) <= -excess) return y;
    }
}

FactorMap identity_factor_map(uint32_t rank) {
    return {Eigen::MatrixXd::Identity(rank, rank), Eigen::MatrixXd::Identity(rank, rank)};
}

void apply_factor_map(GibbsState& st, const FactorMap& map, int threads) {
    const uint32_t K = st.rank;
    const auto users = static_cast<int64_t>(st.user_factors.size() / K);
    const auto items = static_cast<int64_t>(st.item_factors.size() / K);
    const std::vector<double> user_map = padded_columns(map.user), item_map = padded_columns(map.item);
    const size_t stride = row_kernels::padded(K);
    const row_kernels::Table& kernels = row_kernels::table_for(active_cpu_level());
    const int64_t user_blocks = (users + int64_t(kBlockRows) - 1) / int64_t(kBlockRows);
    const int64_t item_blocks = (items + int64_t(kBlockRows) - 1) / int64_t(kBlockRows);
    // One team for both sides: the user rows, then (no barrier between) the
    // item rows; each row is mapped alone, so any split gives the same bits.
#pragma omp parallel num_threads(team_size(threads))
    {
        std::vector<double> out(stride);
#pragma omp for schedule(dynamic, 1) nowait
        for (int64_t b = 0; b < user_blocks; ++b) {
            const int64_t first = b * int64_t(kBlockRows), n = std::min<int64_t>(int64_t(kBlockRows), users - first);
            kernels.map_rows(st.user_factors.data() + size_t(first) * K, uint64_t(n), K, user_map.data(), stride,
                             out.data());
        }
#pragma omp for schedule(dynamic, 1) nowait
        for (int64_t b = 0; b < item_blocks; ++b) {
            const int64_t first = b * int64_t(kBlockRows), n = std::min<int64_t>(int64_t(kBlockRows), items - first);
            kernels.map_rows(st.item_factors.data() + size_t(first) * K, uint64_t(n), K, item_map.data(), stride,
                             out.data());
        }
    }
}

void scale_factor_axis(GibbsState& st, FactorMap& map, uint32_t k, double s) {
    map.user.row(k) *= s;
    map.item.row(k) /= s;
    st.user_mu[k] *= s;
    st.item_mu[k] /= s;
    st.user_lambda.row(k) /= s;
    st.user_lambda.col(k) /= s;
    st.item_lambda.row(k) *= s;
    st.item_lambda.col(k) *= s;
}

ShearConditional shear_conditional(const FitOptions& o, const GibbsState& st, uint32_t i, uint32_t j) {
    const double denom = st.user_lambda(i, i) + st.item_lambda(j, j);
    return {(st.user_lambda(i, j) - st.item_lambda(i, j)) / denom, std::sqrt(o.prior.w0_scale / denom)};
}

void shear_factor_axes(GibbsState& st, FactorMap& map, uint32_t i, uint32_t j, double c) {
    map.user.row(i) += c * map.user.row(j);
    map.item.row(j) -= c * map.item.row(i);
    st.user_mu[i] += c * st.user_mu[j];
    st.item_mu[j] -= c * st.item_mu[i];
    // Lambda_U <- A^-T Lambda_U A^-1, A^-1 = I - c e_i e_j^T: column j -= c column i, then row j likewise.
    st.user_lambda.col(j) -= c * st.user_lambda.col(i);
    st.user_lambda.row(j) -= c * st.user_lambda.row(i);
    // Lambda_V <- A Lambda_V A^T: row i += c row j, then column i likewise.
    st.item_lambda.row(i) += c * st.item_lambda.row(j);
    st.item_lambda.col(i) += c * st.item_lambda.col(j);
}

void symmetrize_precisions(GibbsState& st) {
    st.user_lambda = 0.5 * (st.user_lambda + st.user_lambda.transpose()).eval();
    st.item_lambda = 0.5 * (st.item_lambda + st.item_lambda.transpose()).eval();
}

// ---- the composition fit_bpmf runs

void apply_group_moves(const FitOptions& o, const SweepKey& key, GibbsState& st, int threads) {
    const uint32_t K = st.rank;
    {
        FactorMap map = identity_factor_map(K);
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, factor_space);
        for (uint32_t k = 0; k < K; ++k) {
            const ScaleConditional c = scale_conditional(o, st, k);
            const double log_t = c.log_eta + draw_log_symmetric_gig(rng, c.omega);
            scale_factor_axis(st, map, k, std::exp(0.5 * log_t));
        }
        for (uint32_t i = 0; i < K; ++i)
            for (uint32_t j = 0; j < K; ++j) {
                if (i == j) continue;
                const ShearConditional c = shear_conditional(o, st, i, j);
                shear_factor_axes(st, map, i, j, c.mean + rng.normal() * c.sd);
            }
        // Keep the precisions exactly symmetric for later factorizations.
        symmetrize_precisions(st);
        apply_factor_map(st, map, threads);
    }
    if (!st.biases) return;
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, user_shift);
        shift_users(st, draw_shift(user_shift_conditional(o, st, threads), rng, key, "user"), threads);
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, item_shift);
        shift_items(st, draw_shift(item_shift_conditional(o, st, threads), rng, key, "item"), threads);
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, bias_shift);
        const ShiftConditional c = bias_shift_conditional(st);
        const double precision = c.precision(0, 0);
        const double a = c.precision_mean(0) / precision + rng.normal() / std::sqrt(precision);
        shift_biases(st, a);
    }
}

}  // namespace credence
