// Mixture helpers declared in model/predict.hpp, and the standard normal
// functions of model/normal.hpp.
//
// Mixture quantiles: every component quantile q_s = m_s + z_p / sqrt(tau_s)
// has F_s(q_s) = p, so F(min_s q_s) <= p <= F(max_s q_s) for the mixture CDF F
// (an average of the F_s). That bracket is refined by Newton steps on F,
// falling back to bisection whenever a step leaves the bracket. Upper-half
// probabilities are solved on the mirrored mixture so that 1 - p never
// suffers cancellation.
#include <algorithm>
#include <cmath>
#include <limits>
#include <numbers>
#include <stdexcept>
#include <string>

#include "model/normal.hpp"
#include "model/predict.hpp"

namespace credence {

double standard_normal_cdf(double z) { return 0.5 * std::erfc(-z * std::numbers::sqrt2 * 0.5); }

double standard_normal_quantile(double p) {
    if (!(p > 0.0 && p < 1.0))
        throw std::invalid_argument("normal quantile needs a probability strictly between 0 and 1, got " +
                                    std::to_string(p));
    // Work in the lower half, where erfc has full relative accuracy; 1 - p is
    // exact for p >= 0.5 (Sterbenz).
    if (p > 0.5) return -standard_normal_quantile(1.0 - p);
    // Starting point: P. J. Acklam's rational approximation (relative error
    // about 1.2e-9), coefficients as published by the author (recalled from
    // memory; the Halley step below removes any residual error, and tests
    // compare against scipy.stats.norm.ppf).
    static constexpr double a[] = {-3.969683028665376e+01, 2.209460984245205e+02, -2.759285104469687e+02,
                                   1.383577518672690e+02,  -3.066479806614716e+01, 2.506628277459239e+00};
    static constexpr double b[] = {-5.447609879822406e+01, 1.615858368580409e+02, -1.556989798598866e+02,
                                   6.680131188771972e+01,  -1.328068155288572e+01};
    static constexpr double c[] = {-7.784894002430293e-03, -3.223964580411365e-01, -2.400758277161838e+00,
                                   -2.549732539343734e+00, 4.374664141464968e+00,  2.938163982698783e+00};
    static constexpr double d[] = {7.784695709041462e-03, 3.224671290700398e-01, 2.445134137142996e+00,
                                   3.754408661907416e+00};
    double x;
    if (p < 0.02425) {
        const double q = std::sqrt(-2.0 * std::log(p));
        x = (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5]) /
            ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1.0);
    } else {
        const double q = p - 0.5, r = q * q;
        x = (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q /
            (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1.0);
    }
    // One Halley step on Phi(x) - p (third-order convergence).
    const double e = standard_normal_cdf(x) - p;
    const double u = e * std::sqrt(2.0 * std::numbers::pi) * std::exp(0.5 * x * x);
    if (std::isfinite(u)) x = x - u / (1.0 + 0.5 * x * u);
    return x;
}

namespace {

void check_sizes(std::span<const double> m, std::span<const float> tau) {
    if (m.empty() || m.size() != tau.size())
        throw std::invalid_argument("mixture needs as many noise precisions as means, and at least one (got " +
                                    std::to_string(m.size()) + " means, " + std::to_string(tau.size()) +
                                    " precisions)");
}

// Solves mean_s Phi(sqrt(tau_s) * (y - sign * m_s)) = target for y. With
// sign = -1 this is the mirrored mixture, whose CDF at -x is the survival
// function of the original at x.
double solve_mixture_cdf(std::span<const double> m, std::span<const float> tau, double sign, double target) {
    const size_t S = m.size();
    const double inv_S = 1.0 / static_cast<double>(S);
    const double z = standard_normal_quantile(target);
    double lo = std::numeric_limits<double>::infinity(), hi = -lo, start = 0.0;
    for (size_t s = 0; s < S; ++s) {
        const double q = sign * m[s] + z / std::sqrt(static_cast<double>(tau[s]));
        lo = std::min(lo, q);
        hi = std::max(hi, q);
        start += q;
    }
    start *= inv_S;
    // F(y) - target and its derivative.
    auto eval = [&](double y, double& density) {
        double cdf = 0.0, pdf = 0.0;
        for (size_t s = 0; s < S; ++s) {
            const double st = std::sqrt(static_cast<double>(tau[s]));
            const double t = st * (y - sign * m[s]);
            cdf += standard_normal_cdf(t);
            pdf += st * std::exp(-0.5 * t * t);
        }
        density = pdf * inv_S / std::sqrt(2.0 * std::numbers::pi);
        return cdf * inv_S - target;
    };
    // The bracket is exact in real arithmetic; widen it if rounding in the
    // component quantiles put it a hair off.
    double dens;
    for (double step = 1e-12 * (1.0 + std::abs(lo)); eval(lo, dens) > 0.0; step *= 2.0) lo -= step;
    for (double step = 1e-12 * (1.0 + std::abs(hi)); eval(hi, dens) < 0.0; step *= 2.0) hi += step;
    double y = start;
    for (int iter = 0; iter < 200; ++iter) {
        const double tol = 1e-11 * (1.0 + std::abs(y));
        if (hi - lo <= tol) return 0.5 * (lo + hi);
        const double f = eval(y, dens);
        if (f == 0.0) return y;
        (f < 0.0 ? lo : hi) = y;
        double next = dens > 0.0 ? y - f / dens : std::numeric_limits<double>::quiet_NaN();
        if (!(next > lo && next < hi)) next = 0.5 * (lo + hi);
        if (std::abs(next - y) <= tol) return next;
        y = next;
    }
    return y;
}

}  // namespace

double mixture_mean(std::span<const double> m) {
    if (m.empty()) throw std::invalid_argument("mixture needs at least one component");
    double sum = 0.0;
    for (double v : m) sum += v;
    return sum / static_cast<double>(m.size());
}

double mixture_sd(std::span<const double> m, std::span<const float> tau) {
    check_sizes(m, tau);
    // Law of total variance: mean noise variance + spread of the means
    // (two-pass, so no cancellation).
    const double mean = mixture_mean(m);
    double spread = 0.0, noise = 0.0;
    for (size_t s = 0; s < m.size(); ++s) {
        spread += (m[s] - mean) * (m[s] - mean);
        noise += 1.0 / static_cast<double>(tau[s]);
    }
    return std::sqrt((spread + noise) / static_cast<double>(m.size()));
}

double mixture_cdf(std::span<const double> m, std::span<const float> tau, double x) {
    check_sizes(m, tau);
    double sum = 0.0;
    for (size_t s = 0; s < m.size(); ++s)
        sum += standard_normal_cdf(std::sqrt(static_cast<double>(tau[s])) * (x - m[s]));
    return sum / static_cast<double>(m.size());
}

double mixture_quantile(std::span<const double> m, std::span<const float> tau, double p) {
    check_sizes(m, tau);
    if (!(p > 0.0 && p < 1.0))
        throw std::invalid_argument("mixture quantile needs a probability strictly between 0 and 1, got " +
                                    std::to_string(p));
    if (p <= 0.5) return solve_mixture_cdf(m, tau, 1.0, p);
    return -solve_mixture_cdf(m, tau, -1.0, 1.0 - p);
}

double mixture_log_density(std::span<const double> m, std::span<const float> tau, double x) {
    check_sizes(m, tau);
    // log-sum-exp over components, so far tails do not underflow to -inf.
    double best = -std::numeric_limits<double>::infinity();
    for (size_t s = 0; s < m.size(); ++s) {
        const double t = static_cast<double>(tau[s]);
        best = std::max(best, 0.5 * std::log(t) - 0.5 * t * (x - m[s]) * (x - m[s]));
    }
    double sum = 0.0;
    for (size_t s = 0; s < m.size(); ++s) {
        const double t = static_cast<double>(tau[s]);
        sum += std::exp(0.5 * std::log(t) - 0.5 * t * (x - m[s]) * (x - m[s]) - best);
    }
    return best + std::log(sum / static_cast<double>(m.size())) - 0.5 * std::log(2.0 * std::numbers::pi);
}

}  // namespace credence
