// Convergence diagnostics for MCMC draws of one scalar quantity: the
// rank-normalized split R-hat, bulk-ESS and tail-ESS of Vehtari, Gelman,
// Simpson, Carpenter & Buerkner (2021), "Rank-normalization, folding, and
// localization: an improved R-hat for assessing convergence of MCMC",
// Bayesian Analysis 16(2), 667-718.
//
// Definitions used throughout (M chains of N draws after splitting):
//   split      each chain is cut into its first and second half; with an odd
//              length the middle draw is dropped, so both halves have
//              floor(N0/2) draws. One chain is still split (giving M = 2).
//   W          mean over chains of the within-chain variance s_m^2 (divisor N-1)
//   B/N        variance of the chain means (divisor M-1)
//   var+       (N-1)/N * W + B/N
//   R-hat      sqrt(var+ / W)
//   rho_t      1 - (W - mean_m s_m^2 rho_{t,m}) / var+, where rho_{t,m} is
//              chain m's lag-t autocorrelation from the biased (divisor N)
//              autocovariance, computed exactly by zero-padded FFT in
//              O(N log N) per chain, so the cost does not depend on how slowly
//              a chain mixes.
//   ESS        M N / tau, tau = -1 + 2 sum_{k=0}^{K} P_k with P_k = rho_{2k} +
//              rho_{2k+1}: Geyer's initial monotone sequence (P_0 is always
//              kept; the sum stops before the first negative P_k, and each
//              P_k is lowered to min(P_k, P_{k-1})). As a safeguard for
//              antithetic chains tau is bounded below by 1/log10(M N), so the
//              ESS never exceeds M N log10(M N) (common practice).
//   rank normalization  pooled fractional ranks r (ties get their average
//              rank, 1-based) over all S = M N split draws, mapped to
//              z = Phi^-1((r - 3/8) / (S + 1/4)) (Blom's offset).
//   bulk-ESS   ESS of the rank-normalized split chains.
//   R-hat (reported)  max of the bulk R-hat (rank-normalized split chains)
//              and the folded R-hat (rank-normalized |x - median(x)|).
//   tail-ESS   min of the ESS of I(x <= q05) and I(x <= q95) on the split
//              chains (no rank normalization; quantiles of the pooled split
//              draws by linear interpolation between order statistics,
//              q(p) = x_(floor(h)) + frac(h) (x_(floor(h)+1) - x_(floor(h))),
//              h = (S-1) p, 0-based).
//
// Undefined cases (documented, never a crash):
//   - every draw equal, or any draw non-finite: all three figures are NaN.
//   - every split chain constant but at different values: R-hat is +inf
//     (clearly not mixed) and the ESS figures are finite and tiny.
//   - a component R-hat is NaN while the other is defined (e.g. the folded
//     draws of a two-valued quantity are all equal): the defined one is
//     reported.
//   - an indicator for tail-ESS is constant (one value holds more than 95% of
//     the draws): tail-ESS is the ESS of the other indicator, NaN if both are.
// Draws are given per chain: draws[chain][iteration], every chain the same
// length. Throws std::invalid_argument for no chains, chains of unequal
// length, or fewer than 4 draws per chain (a split half needs 2 draws for a
// variance): callers (model/fit/convergence_summary.hpp) check the shape
// first, so these are bugs, never a user's doing.
#pragma once
#include <span>
#include <vector>

namespace credence {

// draws[chain][iteration] of one scalar quantity.
using ChainDraws = std::vector<std::vector<double>>;

struct ConvergenceStats {
    double rhat = 0.0;      // max(bulk, folded) rank-normalized split R-hat
    double ess_bulk = 0.0;  // total over chains, not per chain
    double ess_tail = 0.0;  // total over chains, not per chain
};

// All three figures for one quantity; see the definitions above.
ConvergenceStats convergence(const ChainDraws& draws_by_chain);

// ---- building blocks (public so tests and callers can check each step)

// Halves every chain (dropping the middle draw of an odd-length chain).
// Throws std::invalid_argument on the shape problems listed above.
ChainDraws split_chains(const ChainDraws& draws_by_chain);

// Pooled fractional ranks mapped through the inverse normal CDF; same shape
// as the input. Needs at least one draw; draws must be finite.
ChainDraws rank_normalize(const ChainDraws& chains);

// R-hat and ESS of chains used as given (no splitting, no ranks). Need >= 2
// chains of equal length >= 2. R-hat: NaN when W = B = 0, +inf when only
// W = 0. ESS: NaN when var+ = 0.
double rhat_basic(const ChainDraws& chains);
double ess_basic(const ChainDraws& chains);

// Biased autocovariance gamma_t = (1/n) sum_{i<n-t} (x_i - xbar)(x_{i+t} - xbar)
// for t = 0..n-1, by zero-padded FFT. Needs n >= 1; throws
// std::invalid_argument otherwise.
std::vector<double> autocovariance(std::span<const double> x);

// The p-quantile (0 <= p <= 1) of the values by linear interpolation between
// order statistics (definition above). Needs a non-empty input; throws
// std::invalid_argument for an empty input or p outside [0, 1].
double quantile_linear(std::vector<double> values, double p);

}  // namespace credence
