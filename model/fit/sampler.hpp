// The BPMF Gibbs sampler (Salakhutdinov & Mnih, ICML 2008), extended with
// optional user and item biases and a sampled noise precision.
//
// Model:  r_ui ~ Normal(g + b_u + c_i + <U_u, V_i>, 1/tau)
//         U_u ~ Normal(mu_U, Lambda_U^-1),  (mu_U, Lambda_U) ~ Normal-Wishart(mu0, beta0, W0, nu0)
//         V_i likewise with its own (mu_V, Lambda_V)
//         b_u ~ Normal(0, 1/lambda_b), c_i ~ Normal(0, 1/lambda_c), lambda_* ~ Gamma(a0, b0)
//         tau ~ Gamma(a0, b0) (or fixed)
// g is the training mean, held fixed. Each sweep draws, in order: user
// hyperparameters, every user row (factor and bias jointly, exactly from
// their Gaussian conditional), item hyperparameters, every item row, the bias
// precisions, then tau. Rows are drawn in parallel (OpenMP); every draw uses
// a stream keyed by (seed, chain, sweep, block, row), so results do not
// depend on the thread count.
#pragma once
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include "model/posterior/posterior.hpp"
#include "model/data/ratings.hpp"

namespace credence {

struct HyperpriorOptions {
    // Normal-Wishart on each factor population; the paper's defaults:
    // mu0 = 0, beta0 = 2, W0 = I, nu0 = K.
    double beta0 = 2.0;
    double nu0_minus_rank = 0.0;  // nu0 = rank + this (must be > -1)
    double w0_scale = 1.0;        // W0 = w0_scale * I
    // Gamma(shape, rate) prior on the noise precision and on the bias precisions.
    double noise_shape = 1.0;
    double noise_rate = 1.0;
    double bias_shape = 1.0;
    double bias_rate = 1.0;
};

struct FitOptions {
    uint32_t rank = 10;
    // Defaults: 100 kept draws per chain is the least that can show the
    // ESS >= 100 per chain the convergence check asks for (Vehtari et al. 2021).
    uint32_t burn_in = 200;          // sweeps discarded per chain
    uint32_t samples = 100;          // samples kept per chain
    uint32_t thin = 2;               // sweeps between kept samples
    uint32_t chains = 2;
    uint64_t seed = 1;
    int threads = 0;                 // 0: OpenMP default
    bool biases = true;
    bool sample_noise = true;
    double fixed_noise_precision = 2.0;  // used when !sample_noise (the paper's alpha = 2)
    double init_scale = -1.0;        // sd of the random initial factors; negative: automatic,
                                     // (rating variance / 2K)^(1/4), so u.v starts with half the variance
    HyperpriorOptions prior{};
    // Joint moves after each sweep (model/fit/group_moves.hpp); each leaves
    // the posterior exactly invariant. Off only to measure what they buy.
    bool group_moves = true;
};

// What the sampler reports after each sweep (for progress lines and traces).
struct SweepReport {
    uint32_t chain = 0;
    uint32_t sweep = 0;              // 0-based within the chain
    uint32_t sweeps_per_chain = 0;   // burn_in + samples * thin
    bool kept = false;               // this sweep's state was kept
    double noise_precision = 0.0;
    double train_rmse = 0.0;         // of this sweep's state on the training ratings
    double validation_rmse = -1.0;   // of the running posterior mean on the validation set; <0 if none
    double elapsed_s = 0.0;          // since the fit started
};

// Per-sweep record kept for diagnostics and the report (all sweeps, burn-in included).
struct SweepTrace {
    std::vector<uint32_t> chain;
    std::vector<uint32_t> sweep;
    std::vector<float> noise_precision;
    std::vector<float> train_rmse;
};

struct FitResult {
    Posterior posterior;             // fit_metadata_json already holds options, timings and trace
    SweepTrace trace;
    double seconds = 0.0;
};

// Fits the model. `train` must be non-empty with sorted unique (user, item)
// pairs (as ingest returns). `validation` may be null; its ratings use the
// indices of `train` (callers drop pairs with unknown ids first).
// `on_sweep` may be empty. Throws:
//   OptionError           impossible options (rank 0, samples 0, a prior
//                         parameter that is not positive, ...), naming the flag;
//   NumericError          a conditional precision that is not positive
//                         definite (with chain, sweep, row);
//   std::invalid_argument `train` empty or holding a pair twice, or a
//                         validation rating outside train's id maps (a bug in
//                         the caller);
//   std::logic_error      the posterior it built fails Posterior::validate()
//                         (a bug in the sampler).
FitResult fit_bpmf(const RatingSet& train, const FitOptions& options,
                   const std::vector<Rating>* validation = nullptr,
                   const std::function<void(const SweepReport&)>& on_sweep = {});

}  // namespace credence
