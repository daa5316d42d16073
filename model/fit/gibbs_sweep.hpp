// One Gibbs sweep of the BPMF model (see model/fit/sampler.hpp for the model and
// the order of draws), on given data and state. fit_bpmf drives it; tests
// drive it directly (e.g. the joint-distribution check) with data whose
// values change between sweeps.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include "model/fit/factor_rows.hpp"
#include "model/math/random.hpp"
#include "model/fit/sampler.hpp"
#include "model/fit/sparse.hpp"

namespace credence {

// The training data in both layouts, plus the fixed offset g. Borrowed: the
// matrices must outlive every sweep that uses them and hold the same ratings.
struct GibbsData {
    const CsrMatrix* by_user = nullptr;
    const CsrMatrix* by_item = nullptr;
    double global_mean = 0.0;
};

// The complete sampler state. Factors are row-major [rows][rank], float32.
struct GibbsState {
    uint32_t rank = 0;
    bool biases = false;
    FactorRows user_factors, item_factors;          // [U][K], [I][K], 64-byte aligned
    std::vector<float> user_bias, item_bias;        // [U], [I]; empty without biases
    Eigen::VectorXd user_mu, item_mu;               // hyperparameters used by the latest row draws
    Eigen::MatrixXd user_lambda, item_lambda;
    double user_bias_precision = 1.0, item_bias_precision = 1.0;
    double noise_precision = 1.0;
    double sse = 0.0;  // training squared error of the factors drawn in the latest sweep
};

struct SweepKey {
    uint64_t seed = 0;
    uint32_t chain = 0;
    uint32_t sweep = 0;
};

// A chain's starting point: factors and biases ~ Normal(0, init_scale^2)
// from streams keyed (seed, chain, 0, init, row); mu = 0, Lambda = I, bias
// precisions at their prior mean, tau = options.fixed_noise_precision.
GibbsState initial_state(const GibbsData& data, const FitOptions& options, uint64_t seed, uint32_t chain);

// One sweep in place: user hyperparameters, user rows, item hyperparameters,
// item rows, bias precisions, tau, then the group moves. `threads` > 0 caps
// the OpenMP team for the row loops; the result is bit-identical for any
// value. Throws NumericError naming chain, sweep, side and row when a
// conditional precision is not positive definite or a draw is not finite;
// the state is then unusable. Needs options that fit_bpmf would accept.
void gibbs_sweep(const GibbsData& data, const FitOptions& options, const SweepKey& key, GibbsState& state,
                 int threads);

// How the row draws use the row's current value x (model/fit/row_kernels.hpp):
// new = mean + overrelax (x - mean) + noise_scale L^-T z. The sweep uses
// row_draw_rule(options), noise_scale = sqrt(1 - overrelax^2), the only
// choice that leaves each row's conditional invariant; the overload below
// takes any rule so that the joint-distribution test can show it notices a
// wrong one.
struct RowDrawRule {
    double overrelax = 0.0;
    double noise_scale = 1.0;
};
RowDrawRule row_draw_rule(const FitOptions& options);
void gibbs_sweep(const GibbsData& data, const FitOptions& options, const RowDrawRule& rule, const SweepKey& key,
                 GibbsState& state, int threads);

// Where a row draw happens, for error messages.
struct RowContext {
    uint32_t chain = 0;
    uint32_t sweep = 0;
    const char* side = "user";
    uint64_t row = 0;
};

// Scratch space for draw_row, reused across rows so the hot loop does not allocate.
struct RowWorkspace {
    Eigen::MatrixXd p;                              // conditional precision, lower triangle
    Eigen::LLT<Eigen::MatrixXd, Eigen::Lower> llt;
    Eigen::VectorXd rhs, mean;
};

// The exact Gaussian conditional of one row: precision P = prior_precision +
// tau X X^T (X is D x n, one column per rating) and mean P^-1
// (prior_precision_mean + tau X y); writes a draw mean + L^-T z into `out`
// (z from `rng`). Throws NumericError (with the context and P's smallest
// diagonal) when P is not positive definite or the draw is not finite.
void draw_row(const Eigen::MatrixXd& prior_precision, const Eigen::VectorXd& prior_precision_mean,
              const Eigen::Ref<const Eigen::MatrixXd>& x, const Eigen::Ref<const Eigen::VectorXd>& y,
              double tau, Rng& rng, const RowContext& context, RowWorkspace& work, Eigen::VectorXd& out);

}  // namespace credence
