#include "model/math/standard_normal.hpp"

#include <cmath>
#include <numbers>
#include <stdexcept>
#include <string>

namespace credence {

double normal_cdf(double x) { return 0.5 * std::erfc(-x / std::numbers::sqrt2); }

double normal_quantile(double p) {
    if (!(p > 0.0 && p < 1.0))
        throw std::domain_error("normal_quantile: probability " + std::to_string(p) +
                                " is outside the open interval (0, 1)");
    // Acklam's coefficients: central region numerator a / denominator b,
    // tail regions numerator c / denominator d.
    static constexpr double a[6] = {-3.969683028665376e+01, 2.209460984245205e+02,
                                    -2.759285104469687e+02, 1.383577518672690e+02,
                                    -3.066479806614716e+01, 2.506628277459239e+00};
    static constexpr double b[5] = {-5.447609879822406e+01, 1.615858368580409e+02,
                                    -1.556989798598866e+02, 6.680131188771972e+01,
                                    -1.328068155288572e+01};
    static constexpr double c[6] = {-7.784894002430293e-03, -3.223964580411365e-01,
                                    -2.400758277161838e+00, -2.549732539343734e+00,
                                    4.374664141464968e+00,  2.938163982698783e+00};
    static constexpr double d[4] = {7.784695709041462e-03, 3.224671290700398e-01,
                                    2.445134137142996e+00, 3.754408661907416e+00};
    constexpr double p_low = 0.02425;

    // Work in the lower half: for p > 1/2, 1 - p is exact (Sterbenz) and the
    // refinement below keeps its relative accuracy in the far upper tail.
    if (p > 0.5) return -normal_quantile(1.0 - p);

    double x;
    if (p < p_low) {
        const double q = std::sqrt(-2.0 * std::log(p));
        x = (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5]) /
            ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1.0);
    } else {
        const double q = p - 0.5, r = q * q;
        x = (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q /
            (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1.0);
    }

    // One Halley step: e is the CDF error, u = e / phi(x).
    const double e = normal_cdf(x) - p;
    const double u = e * std::sqrt(2.0 * std::numbers::pi) * std::exp(0.5 * x * x);
    return x - u / (1.0 + 0.5 * x * u);
}

}  // namespace credence
