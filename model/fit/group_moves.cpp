#include "model/fit/group_moves.hpp"

#include <cmath>
#include <string>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/math/distributions.hpp"

namespace credence {

namespace {

using RowMajorF = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

enum MoveRow : uint64_t { user_shift = 0, item_shift = 1, bias_shift = 2, factor_space = 3 };

// The shift of `moved` factors against the other side's biases: d ~ Normal
// with precision beta0 Lambda + lambda sum_j W_j W_j^T (W = the other side's
// factors) and precision-mean -beta0 Lambda mu + lambda sum_j c_j W_j.
ShiftConditional shift_conditional(const Eigen::VectorXd& mu, const Eigen::MatrixXd& lambda,
                                   const std::vector<float>& other_factors, const std::vector<float>& compensated,
                                   double bias_precision, double beta0, uint32_t rank) {
    const auto others = static_cast<Eigen::Index>(other_factors.size() / rank);
    Eigen::Map<const RowMajorF> w(other_factors.data(), others, rank);
    Eigen::Map<const Eigen::VectorXf> c(compensated.data(), others);
    const Eigen::MatrixXd wd = w.cast<double>();
    ShiftConditional out;
    out.precision = beta0 * lambda;
    out.precision.selfadjointView<Eigen::Lower>().rankUpdate(wd.transpose(), bias_precision);
    out.precision = out.precision.selfadjointView<Eigen::Lower>();
    out.precision_mean = -beta0 * (lambda * mu) + bias_precision * (wd.transpose() * c.cast<double>());
    return out;
}

// moved[r] += d (every row), mu += d, compensated[j] -= d . other_factors[j].
void shift_side(std::vector<float>& moved, Eigen::VectorXd& mu, const std::vector<float>& other_factors,
                std::vector<float>& compensated, uint32_t rank, const Eigen::VectorXd& d) {
    const auto rows = static_cast<Eigen::Index>(moved.size() / rank);
    const auto others = static_cast<Eigen::Index>(other_factors.size() / rank);
    Eigen::Map<const RowMajorF> w(other_factors.data(), others, rank);
    const Eigen::MatrixXd wd = w.cast<double>();
    Eigen::Map<RowMajorF> m(moved.data(), rows, rank);
    m.rowwise() += d.cast<float>().transpose();
    mu += d;
    const Eigen::VectorXd shift = wd * d;
    for (Eigen::Index j = 0; j < others; ++j) compensated[j] = static_cast<float>(double(compensated[j]) - shift[j]);
}

void column_axpy(std::vector<float>& f, uint32_t rank, uint32_t to, uint32_t from, double c) {
    for (size_t r = 0; r < f.size(); r += rank) f[r + to] = static_cast<float>(f[r + to] + c * f[r + from]);
}

void column_scale(std::vector<float>& f, uint32_t rank, uint32_t k, double s) {
    for (size_t r = 0; r < f.size(); r += rank) f[r + k] = static_cast<float>(f[r + k] * s);
}

}  // namespace

// ---- the shifts along the bias ridges

ShiftConditional user_shift_conditional(const FitOptions& o, const GibbsState& st) {
    return shift_conditional(st.user_mu, st.user_lambda, st.item_factors, st.item_bias, st.item_bias_precision,
                             o.prior.beta0, st.rank);
}

ShiftConditional item_shift_conditional(const FitOptions& o, const GibbsState& st) {
    return shift_conditional(st.item_mu, st.item_lambda, st.user_factors, st.user_bias, st.user_bias_precision,
                             o.prior.beta0, st.rank);
}

void shift_users(GibbsState& st, const Eigen::VectorXd& d) {
    shift_side(st.user_factors, st.user_mu, st.item_factors, st.item_bias, st.rank, d);
}

void shift_items(GibbsState& st, const Eigen::VectorXd& e) {
    shift_side(st.item_factors, st.item_mu, st.user_factors, st.user_bias, st.rank, e);
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

void scale_factor_axis(GibbsState& st, uint32_t k, double s) {
    column_scale(st.user_factors, st.rank, k, s);
    column_scale(st.item_factors, st.rank, k, 1.0 / s);
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

void shear_factor_axes(GibbsState& st, uint32_t i, uint32_t j, double c) {
    column_axpy(st.user_factors, st.rank, i, j, c);
    column_axpy(st.item_factors, st.rank, j, i, -c);
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

void apply_group_moves(const FitOptions& o, const SweepKey& key, GibbsState& st) {
    const uint32_t K = st.rank;
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, factor_space);
        for (uint32_t k = 0; k < K; ++k) {
            const ScaleConditional c = scale_conditional(o, st, k);
            const double log_t = c.log_eta + draw_log_symmetric_gig(rng, c.omega);
            scale_factor_axis(st, k, std::exp(0.5 * log_t));
        }
        for (uint32_t i = 0; i < K; ++i)
            for (uint32_t j = 0; j < K; ++j) {
                if (i == j) continue;
                const ShearConditional c = shear_conditional(o, st, i, j);
                shear_factor_axes(st, i, j, c.mean + rng.normal() * c.sd);
            }
        // Keep the precisions exactly symmetric for later factorizations.
        symmetrize_precisions(st);
    }
    if (!st.biases) return;
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, user_shift);
        shift_users(st, draw_shift(user_shift_conditional(o, st), rng, key, "user"));
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, item_shift);
        shift_items(st, draw_shift(item_shift_conditional(o, st), rng, key, "item"));
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
