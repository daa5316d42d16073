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
// precisions, tau, then the group moves (model/fit/group_moves.hpp). Rows
// are drawn in parallel (OpenMP); every draw uses a stream keyed by (seed,
// chain, sweep, block, row), so results do not depend on the thread count.
//
// Run length. By default (RunLength::converged) every chain runs until the
// quantities of model/fit/convergence_summary.hpp reach the targets (R-hat
// <= 1.01, bulk- and tail-ESS >= 100 per chain; Vehtari et al. 2021) on the
// last three quarters of its sweeps, or a budget (max_sweeps per chain,
// max_seconds of wall clock) runs out. Checks happen at checkpoints n = 2S,
// then each 1.25 times the last (S = samples per chain); the first quarter of
// each chain is burn-in (a start still drifting after it shows in the split
// R-hat and keeps the run going), and `samples` draws evenly spaced over the
// rest are kept. RunLength::fixed runs burn_in + samples * thin sweeps instead. In
// both, the convergence figures come from every sweep after burn-in (not
// only the kept draws), and chains run at the same time when there are
// threads for them; samples are bit-identical whatever the thread count and
// however the chains are scheduled.
//
// Warm starts (model/fit/warm_start.hpp). Given `start`, chain c begins at
// start->states[c] instead of a random point, and a converged run discards
// min(n/4, start->burn_in) sweeps instead of n/4. The quarter exists to
// forget a start far out in the tails; a start that is a draw of a converged
// posterior of nearly the same data is already where the chain spends its
// time, and what it must still forget (the new ratings' pull, the new rows,
// which the first sweep draws from their conditionals) fades in a few
// autocorrelation times of the slowest quantity. Discarding more would not
// make the kept draws more trustworthy, only the run longer. The split R-hat
// stays the safety net: a start that is still drifting after the short
// burn-in makes each chain's halves disagree and the run go on. The run
// length is then still set by the R-hat and ESS targets on the slowest
// quantity, not by the start: on MovieLens small over six seeds, warm runs
// took 0.89x the cold sweeps in total, and even chains started on the
// posterior they sample took 1/1.39 (scripts/bench-warm-start; README.md
// "Warm start").
#pragma once
#include <cstdint>
#include <functional>
#include <string>
#include <vector>

#include "model/data/ratings.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/posterior/posterior.hpp"

namespace credence {

struct WarmStart;  // model/fit/warm_start.hpp

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

enum class RunLength {
    converged,  // until the convergence targets are met or a budget runs out
    fixed,      // burn_in + samples * thin sweeps per chain
};

struct FitOptions {
    // 16 by measurement (README, "Choosing the rank"): at 10 the dimensions are
    // contested on real exports and the chains sit in different allocations of
    // them for thousands of sweeps (a prediction's chains 0.2 apart), while 16
    // mixes those predictions 100x faster per sweep and scores better held out.
    uint32_t rank = 16;
    RunLength run_length = RunLength::converged;
    uint32_t samples = 100;          // draws kept per chain (file size grows with it)
    // RunLength::fixed only:
    uint32_t burn_in = 200;          // sweeps discarded per chain
    uint32_t thin = 2;               // sweeps between kept samples
    // RunLength::converged only: the budget. The run stops at the first
    // checkpoint that meets the targets, reaches max_sweeps, or finds that
    // the next checkpoint would end after max_seconds (0: no clock limit).
    uint32_t max_sweeps = 20000;     // per chain
    double max_seconds = 0.0;
    ConvergenceOptions convergence{};  // targets and probe pairs
    uint32_t chains = 2;
    uint64_t seed = 1;
    int threads = 0;                 // all chains together; 0: OpenMP default (every core)
    bool biases = true;
    bool sample_noise = true;
    double fixed_noise_precision = 2.0;  // used when !sample_noise (the paper's alpha = 2)
    double init_scale = -1.0;        // sd of the random initial factors; negative: automatic,
                                     // (rating variance / 2K)^(1/4), so u.v starts with half the variance
    HyperpriorOptions prior{};
    // Joint moves after each sweep (model/fit/group_moves.hpp); each leaves
    // the posterior exactly invariant. Off only to measure what they buy.
    bool group_moves = true;
    // Overrelaxed row draws (model/fit/row_kernels.hpp): each row moves to
    // mean + a (current - mean) + sqrt(1 - a^2) x noise, which leaves its
    // Gaussian conditional exactly invariant for any a in (-1, 1); a < 0
    // steps past the mean and so suppresses the random walk of slowly
    // changing factor directions (Adler 1981). 0: plain Gibbs draws.
    double overrelaxation = -0.7;
};

// What the sampler reports while it runs (for progress lines), from the
// calling thread only: a few times a second, and at every checkpoint.
struct FitProgress {
    uint32_t sweeps_done = 0;        // per chain: the fewest any chain has done
    uint32_t next_checkpoint = 0;    // sweeps per chain at the next check (fixed: the total)
    uint32_t max_sweeps = 0;         // the budget per chain (fixed: the total)
    uint32_t chains = 0;
    uint32_t parallel_chains = 0;    // chains running at the same time
    double elapsed_s = 0.0;          // since the fit started
    double train_rmse = -1.0;        // latest sweep of chain 0; <0 before the first
    // At a checkpoint (converged runs), the figures of the window just assessed:
    bool checkpoint = false;
    double max_rhat = 0.0;
    std::string worst_rhat;          // label of the quantity with the largest R-hat
    double min_ess_per_chain = 0.0;  // min over quantities of min(bulk, tail) per chain
    std::string worst_ess;
    double validation_rmse = -1.0;   // posterior mean of the draws held so far; <0 if no validation set
};

// Why sampling ended.
enum class StopReason {
    converged,        // every monitored quantity met the targets
    max_sweeps,       // budget: sweeps per chain
    time_limit,       // budget: wall clock
    fixed_length,     // RunLength::fixed
};
const char* stop_reason_name(StopReason reason);  // "converged", "max_sweeps", "time_limit", "fixed_length"

// Per-sweep record kept for diagnostics and the report (all sweeps, burn-in included).
struct SweepTrace {
    std::vector<uint32_t> chain;
    std::vector<uint32_t> sweep;
    std::vector<float> noise_precision;
    std::vector<float> train_rmse;
};

struct FitResult {
    Posterior posterior;             // fit_metadata_json holds options, timings, trace and run length;
                                     // diagnostics_json holds `convergence`
    SweepTrace trace;
    ConvergenceSummary convergence;  // of every sweep in the final window, with advice when not converged
    StopReason stop_reason = StopReason::fixed_length;
    uint32_t sweeps_per_chain = 0;
    double seconds = 0.0;
};

// Fits the model. `train` must be non-empty with sorted unique (user, item)
// pairs (as ingest returns). `validation` may be null; its ratings use the
// indices of `train` (callers drop pairs with unknown ids first).
// `on_progress` may be empty. `start` (may be null) holds one state per
// chain shaped for `train` (warm_start_from builds it); its record is stored
// in the fit metadata under "start". Throws:
//   OptionError           impossible options (rank 0, samples 0, a prior
//                         parameter that is not positive, ...), naming the flag;
//   NumericError          a conditional precision that is not positive
//                         definite (with chain, sweep, row);
//   std::invalid_argument `train` empty or holding a pair twice, a
//                         validation rating outside train's id maps, or a
//                         start whose states do not match the chains or the
//                         training set's shape (bugs in the caller);
//   std::logic_error      the posterior it built fails Posterior::validate()
//                         (a bug in the sampler).
// Throws OptionError, naming the flag, for options fit_bpmf cannot run with
// (the first case of fit_bpmf's OptionError below); returns normally
// otherwise. The command line calls it before reading any data.
void check_fit_options(const FitOptions& options);

FitResult fit_bpmf(const RatingSet& train, const FitOptions& options,
                   const std::vector<Rating>* validation = nullptr,
                   const std::function<void(const FitProgress&)>& on_progress = {},
                   const WarmStart* start = nullptr);

}  // namespace credence
