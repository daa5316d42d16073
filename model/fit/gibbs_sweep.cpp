#include "model/fit/gibbs_sweep.hpp"

#include <omp.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <limits>
#include <new>
#include <stdexcept>
#include <string>

#include "model/math/cpu_level.hpp"
#include "model/math/distributions.hpp"
#include "model/error.hpp"
#include "model/fit/group_moves.hpp"
#include "model/fit/normal_wishart.hpp"
#include "model/fit/row_kernels.hpp"

namespace credence {

namespace {

constexpr uint64_t item_row_offset = uint64_t(1) << 40;  // keeps init streams of items apart from users

void fill_normal(Rng& rng, float* out, size_t n, double sd) {
    for (size_t j = 0; j < n; ++j) out[j] = static_cast<float>(sd * rng.normal());
}

// Everything one side's row pass needs.
struct SidePass {
    const CsrMatrix* csr;
    const float* other_factors;
    const float* other_bias;  // null without biases
    float* factors;
    float* bias;              // null without biases
    const char* side;
    StreamBlock block;
    double* sse_rows;         // per-row squared error with the new draws; null to skip
};

void start_row(const Eigen::MatrixXd& prior_precision, const Eigen::VectorXd& prior_precision_mean,
               RowWorkspace& work) {
    work.p = prior_precision;
    work.rhs = prior_precision_mean;
}

void add_ratings(const Eigen::Ref<const Eigen::MatrixXd>& x, const Eigen::Ref<const Eigen::VectorXd>& y, double tau,
                 RowWorkspace& work) {
    if (x.cols() == 0) return;
    work.p.selfadjointView<Eigen::Lower>().rankUpdate(x, tau);  // SYRK on the lower triangle
    work.rhs.noalias() += tau * (x * y);
}

std::string not_positive_definite(const RowContext& context, double smallest_diagonal) {
    return "sampler: chain " + std::to_string(context.chain) + ", sweep " + std::to_string(context.sweep) + ", " +
           context.side + " row " + std::to_string(context.row) +
           ": the conditional precision is not positive definite " + "or the draw is not finite (smallest diagonal " +
           std::to_string(smallest_diagonal) + "); check the data for extreme values and the prior and noise options";
}

void finish_row(Rng& rng, const RowContext& context, RowWorkspace& work, Eigen::VectorXd& out) {
    work.llt.compute(work.p);
    if (work.llt.info() == Eigen::Success && work.llt.matrixLLT().diagonal().allFinite()) {
        work.mean = work.llt.solve(work.rhs);
        draw_normal_from_precision_factor(rng, work.mean, work.llt.matrixLLT(), out);
        if (out.allFinite()) return;
    }
    throw NumericError(not_positive_definite(context, work.p.diagonal().minCoeff()));
}

// Per-thread scratch of the row kernels: 64-byte aligned, zero-filled once.
struct KernelScratch {
    double* data = nullptr;
    explicit KernelScratch(uint32_t rank) {
        const size_t bytes = (row_kernels::scratch_doubles(rank) * sizeof(double) + 63) / 64 * 64;
        data = static_cast<double*>(std::aligned_alloc(64, bytes));
        if (!data) throw std::bad_alloc();
        std::memset(data, 0, bytes);
    }
    ~KernelScratch() { std::free(data); }
    KernelScratch(const KernelScratch&) = delete;
    KernelScratch& operator=(const KernelScratch&) = delete;
};

// Draws every row of one side with the active level's kernels
// (model/fit/row_kernels.hpp); rows in parallel, each from its own stream.
void draw_side(const SidePass& s, const Eigen::MatrixXd& prior_precision, const Eigen::VectorXd& prior_mean,
               double tau, double g, uint32_t rank, bool biases, const RowDrawRule& rule, const SweepKey& key,
               int threads) {
    const Eigen::Index d = rank + (biases ? 1 : 0);
    const Eigen::VectorXd prior_pm = prior_precision * prior_mean;
    const Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor> prior_rows = prior_precision;
    const CsrMatrix& csr = *s.csr;
    row_kernels::SideData side;
    side.offsets = csr.offsets.data();
    side.index = csr.index.data();
    side.value = csr.value.data();
    side.nnz = csr.nnz();
    side.other_factors = s.other_factors;
    side.other_bias = s.other_bias;
    side.rank = rank;
    side.biases = biases;
    side.global_mean = g;
    side.tau = tau;
    side.prior_precision = prior_rows.data();
    side.prior_pm = prior_pm.data();
    side.overrelax = rule.overrelax;
    side.overrelax_noise = rule.noise_scale;
    const row_kernels::Table& kernels = row_kernels::table_for(active_cpu_level());
    const auto rows = static_cast<int64_t>(csr.num_rows);
    // The first failure by row order wins, so the message does not depend on scheduling.
    int64_t failed_row = std::numeric_limits<int64_t>::max();
    std::string failure;
    const int team = threads > 0 ? threads : omp_get_max_threads();

#pragma omp parallel num_threads(team)
    {
        KernelScratch scratch(rank);
        std::vector<double> normals(static_cast<size_t>(d));
#pragma omp for schedule(dynamic, 32)
        for (int64_t row = 0; row < rows; ++row) {
            Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, s.block, static_cast<uint64_t>(row));
            rng.normals(normals.data(), normals.size());
            double smallest_diagonal = 0.0;
            const bool ok = kernels.draw_row(side, static_cast<uint64_t>(row), normals.data(), scratch.data,
                                             s.factors + static_cast<size_t>(row) * rank,
                                             biases ? s.bias + row : nullptr, s.sse_rows ? s.sse_rows + row : nullptr,
                                             &smallest_diagonal);
            if (!ok) {
                const std::string message = not_positive_definite(
                    RowContext{key.chain, key.sweep, s.side, static_cast<uint64_t>(row)}, smallest_diagonal);
#pragma omp critical(credence_row_failure)
                if (row < failed_row) {
                    failed_row = row;
                    failure = message;
                }
            }
        }
    }
    if (failed_row != std::numeric_limits<int64_t>::max()) throw NumericError(failure);
}

NormalWishart factor_prior(const FitOptions& o) {
    NormalWishart nw;
    nw.mu = Eigen::VectorXd::Zero(o.rank);
    nw.beta = o.prior.beta0;
    nw.w = o.prior.w0_scale * Eigen::MatrixXd::Identity(o.rank, o.rank);
    nw.nu = double(o.rank) + o.prior.nu0_minus_rank;
    return nw;
}

void draw_hyper(const FactorRows& factors, uint32_t rows, const FitOptions& o, const SweepKey& key,
                StreamBlock block, int threads, Eigen::VectorXd& mu, Eigen::MatrixXd& lambda) {
    const FactorStatistics st = factor_statistics(factors.data(), rows, o.rank, threads);
    Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, block, 0);
    MeanPrecision mp;
    try {
        mp = draw_normal_wishart(rng, normal_wishart_posterior(factor_prior(o), st));
    } catch (const NumericError& e) {
        throw NumericError("sampler: chain " + std::to_string(key.chain) + ", sweep " + std::to_string(key.sweep) +
                           ", " + (block == StreamBlock::user_hyper ? "user" : "item") +
                           " hyperparameters: " + e.what() + "; check the data for extreme values");
    }
    if (!mp.mu.allFinite() || !mp.lambda.allFinite())
        throw NumericError("sampler: chain " + std::to_string(key.chain) + ", sweep " + std::to_string(key.sweep) +
                           ": a hyperparameter draw is not finite; check the data for extreme values");
    mu = std::move(mp.mu);
    lambda = std::move(mp.lambda);
}

double draw_bias_precision(const std::vector<float>& bias, const FitOptions& o, const SweepKey& key,
                           StreamBlock block) {
    double ss = 0.0;
    for (float b : bias) ss += double(b) * b;
    Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, block, 1);
    return draw_gamma(rng, o.prior.bias_shape + 0.5 * double(bias.size()), o.prior.bias_rate + 0.5 * ss);
}

// block-diag(lambda, bias_precision) and [mu; 0] when biases are on.
void row_prior(const Eigen::VectorXd& mu, const Eigen::MatrixXd& lambda, bool biases, double bias_precision,
               Eigen::MatrixXd& precision, Eigen::VectorXd& mean) {
    const Eigen::Index k = mu.size(), d = k + (biases ? 1 : 0);
    precision = Eigen::MatrixXd::Zero(d, d);
    precision.topLeftCorner(k, k) = lambda;
    mean = Eigen::VectorXd::Zero(d);
    mean.head(k) = mu;
    if (biases) precision(k, k) = bias_precision;
}

}  // namespace

void draw_row(const Eigen::MatrixXd& prior_precision, const Eigen::VectorXd& prior_precision_mean,
              const Eigen::Ref<const Eigen::MatrixXd>& x, const Eigen::Ref<const Eigen::VectorXd>& y, double tau,
              Rng& rng, const RowContext& context, RowWorkspace& work, Eigen::VectorXd& out) {
    start_row(prior_precision, prior_precision_mean, work);
    add_ratings(x, y, tau, work);
    finish_row(rng, context, work, out);
}

GibbsState initial_state(const GibbsData& data, const FitOptions& o, uint64_t seed, uint32_t chain) {
    GibbsState st;
    st.rank = o.rank;
    st.biases = o.biases;
    const uint32_t users = data.by_user->num_rows, items = data.by_item->num_rows;
    st.user_factors.resize(size_t(users) * o.rank);
    st.item_factors.resize(size_t(items) * o.rank);
    if (o.biases) {
        st.user_bias.resize(users);
        st.item_bias.resize(items);
    }
    for (uint32_t u = 0; u < users; ++u) {
        Rng rng = Rng::keyed(seed, chain, 0, StreamBlock::init, u);
        fill_normal(rng, st.user_factors.data() + size_t(u) * o.rank, o.rank, o.init_scale);
        if (o.biases) fill_normal(rng, &st.user_bias[u], 1, o.init_scale);
    }
    for (uint32_t i = 0; i < items; ++i) {
        Rng rng = Rng::keyed(seed, chain, 0, StreamBlock::init, item_row_offset + i);
        fill_normal(rng, st.item_factors.data() + size_t(i) * o.rank, o.rank, o.init_scale);
        if (o.biases) fill_normal(rng, &st.item_bias[i], 1, o.init_scale);
    }
    st.user_mu = st.item_mu = Eigen::VectorXd::Zero(o.rank);
    st.user_lambda = st.item_lambda = Eigen::MatrixXd::Identity(o.rank, o.rank);
    st.user_bias_precision = st.item_bias_precision = o.prior.bias_shape / o.prior.bias_rate;
    st.noise_precision = o.fixed_noise_precision;
    return st;
}

RowDrawRule row_draw_rule(const FitOptions& o) {
    return {o.overrelaxation, std::sqrt(1.0 - o.overrelaxation * o.overrelaxation)};
}

void gibbs_sweep(const GibbsData& data, const FitOptions& o, const SweepKey& key, GibbsState& st, int threads) {
    gibbs_sweep(data, o, row_draw_rule(o), key, st, threads);
}

void gibbs_sweep(const GibbsData& data, const FitOptions& o, const RowDrawRule& rule, const SweepKey& key,
                 GibbsState& st, int threads) {
    const CsrMatrix& by_user = *data.by_user;
    const CsrMatrix& by_item = *data.by_item;
    const uint32_t users = by_user.num_rows, items = by_item.num_rows;
    Eigen::MatrixXd prior_precision;
    Eigen::VectorXd prior_mean;

    draw_hyper(st.user_factors, users, o, key, StreamBlock::user_hyper, threads, st.user_mu, st.user_lambda);
    row_prior(st.user_mu, st.user_lambda, o.biases, st.user_bias_precision, prior_precision, prior_mean);
    draw_side(SidePass{&by_user, st.item_factors.data(), o.biases ? st.item_bias.data() : nullptr,
                       st.user_factors.data(), o.biases ? st.user_bias.data() : nullptr, "user",
                       StreamBlock::user_rows, nullptr},
              prior_precision, prior_mean, st.noise_precision, data.global_mean, o.rank, o.biases, rule, key, threads);

    draw_hyper(st.item_factors, items, o, key, StreamBlock::item_hyper, threads, st.item_mu, st.item_lambda);
    row_prior(st.item_mu, st.item_lambda, o.biases, st.item_bias_precision, prior_precision, prior_mean);
    std::vector<double> sse_rows(items, 0.0);
    draw_side(SidePass{&by_item, st.user_factors.data(), o.biases ? st.user_bias.data() : nullptr,
                       st.item_factors.data(), o.biases ? st.item_bias.data() : nullptr, "item",
                       StreamBlock::item_rows, sse_rows.data()},
              prior_precision, prior_mean, st.noise_precision, data.global_mean, o.rank, o.biases, rule, key, threads);
    // Summed in row order: identical for any thread count.
    st.sse = 0.0;
    for (double v : sse_rows) st.sse += v;

    if (o.biases) {
        st.user_bias_precision = draw_bias_precision(st.user_bias, o, key, StreamBlock::user_hyper);
        st.item_bias_precision = draw_bias_precision(st.item_bias, o, key, StreamBlock::item_hyper);
    }
    if (o.sample_noise) {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::noise, 0);
        st.noise_precision = draw_gamma(rng, o.prior.noise_shape + 0.5 * double(by_user.nnz()),
                                        o.prior.noise_rate + 0.5 * st.sse);
    } else {
        st.noise_precision = o.fixed_noise_precision;
    }
    if (!std::isfinite(st.noise_precision) || !(st.noise_precision > 0.0))
        throw NumericError("sampler: chain " + std::to_string(key.chain) + ", sweep " + std::to_string(key.sweep) +
                           ": the noise precision draw is not a positive finite number (training error " +
                           std::to_string(st.sse) + ")");
    if (o.group_moves) apply_group_moves(o, key, st, threads);
}

}  // namespace credence
