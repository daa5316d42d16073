// The standard normal quantile function (inverse CDF), needed by rank
// normalization in the convergence diagnostics.
//
// Algorithm: P. J. Acklam's rational approximation (relative error below
// 1.15e-9 over (0, 1)), followed by one Halley refinement step on
// 0.5 * erfc(-x / sqrt 2) - p, which brings the result to near full double
// precision (Acklam's own suggested refinement).
#pragma once

namespace credence {

// Needs 0 < p < 1. Returns x with Phi(x) = p.
// Throws std::domain_error for p outside (0, 1) or NaN, which is a bug: the
// callers pass rank probabilities (r - 3/8) / (S + 1/4), always inside, or
// probabilities built from an interval level the prediction engine has
// already checked to lie in (0, 1).
double normal_quantile(double p);

// Standard normal CDF, Phi(x) = 0.5 * erfc(-x / sqrt 2).
double normal_cdf(double x);

}  // namespace credence
