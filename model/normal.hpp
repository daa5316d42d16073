// The standard normal CDF and quantile, used by the mixture helpers and by the
// prediction engine's interval bounds. Internal to model/.
#pragma once

namespace credence {

// Phi(z), accurate to double precision in both tails (via erfc).
double standard_normal_cdf(double z);

// Phi^-1(p) for p in (0, 1); relative error near double precision.
// Throws std::invalid_argument for p outside (0, 1).
double standard_normal_quantile(double p);

}  // namespace credence
