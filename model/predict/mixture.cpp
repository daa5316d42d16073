// The predictive mixture (model/predict/mixture.hpp).
//
// Mixture quantiles: every component quantile q_s = m_s + z_p / sqrt(tau_s)
// has F_s(q_s) = p, so F(min_s q_s) <= p <= F(max_s q_s) for the mixture CDF F
// (an average of the F_s). The search starts from the Cornish-Fisher
// expansion of the quantile in the mixture's first four moments (two
// evaluations of F usually suffice, against four to five from the average
// component quantile), and is refined by Halley steps on F, falling back to
// bisection whenever a step leaves the bracket. Upper-half
// probabilities are solved on the mirrored mixture so that 1 - p never
// suffers cancellation.
#include "model/predict/mixture.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <numbers>
#include <stdexcept>
#include <string>
#include <vector>

#include "model/math/standard_normal.hpp"

namespace credence {

namespace {

template <class Precision>
void check_sizes(std::span<const double> m, std::span<const Precision> tau) {
    if (m.empty() || m.size() != tau.size())
        throw std::invalid_argument("mixture needs as many noise precisions as means, and at least one (got " +
                                    std::to_string(m.size()) + " means, " + std::to_string(tau.size()) +
                                    " precisions)");
}

// The Cornish-Fisher expansion of the mixture's z-quantile (Abramowitz and
// Stegun, Handbook of Mathematical Functions, 26.2.49, to the terms in the
// skewness squared and the excess kurtosis; recalled from memory): x = mean +
// sd * (z + (z^2-1) g1/6 + (z^3-3z) g2/24 - (2z^3-5z) g1^2/36). The mixture's
// central moments sum each component's (offset d, variance v): d^2 + v,
// d^3 + 3dv, d^4 + 6d^2v + 3v^2 (the Normal's moments). Only a starting
// point: the caller clamps it into the bracket and solves exactly.
double cornish_fisher_start(std::span<const double> m, const std::vector<double>& root_tau, double sign,
                            double mean, double z) {
    const size_t S = m.size();
    double c2 = 0.0, c3 = 0.0, c4 = 0.0;
    for (size_t s = 0; s < S; ++s) {
        const double d = sign * m[s] - mean, v = 1.0 / (root_tau[s] * root_tau[s]);
        c2 += d * d + v;
        c3 += d * d * d + 3.0 * d * v;
        c4 += d * d * d * d + 6.0 * d * d * v + 3.0 * v * v;
    }
    const double inv_S = 1.0 / static_cast<double>(S);
    c2 *= inv_S;
    c3 *= inv_S;
    c4 *= inv_S;
    const double sd = std::sqrt(c2), g1 = c3 / (c2 * sd), g2 = c4 / (c2 * c2) - 3.0;
    const double z2 = z * z;
    return mean + sd * (z + (z2 - 1.0) * g1 / 6.0 + (z2 * z - 3.0 * z) * g2 / 24.0 -
                        (2.0 * z2 * z - 5.0 * z) * g1 * g1 / 36.0);
}

// Solves mean_s Phi(sqrt(tau_s) * (y - sign * m_s)) = target for y. With
// sign = -1 this is the mirrored mixture, whose CDF at -x is the survival
// function of the original at x.
template <class Precision>
double solve_mixture_cdf(std::span<const double> m, std::span<const Precision> tau, double sign, double target) {
    const size_t S = m.size();
    const double inv_S = 1.0 / static_cast<double>(S);
    const double z = normal_quantile(target);
    // sqrt(tau_s) once per solve (the same bits every evaluation would get).
    thread_local std::vector<double> root_tau;
    root_tau.resize(S);
    for (size_t s = 0; s < S; ++s) root_tau[s] = std::sqrt(static_cast<double>(tau[s]));
    double lo = std::numeric_limits<double>::infinity(), hi = -lo, mean = 0.0;
    for (size_t s = 0; s < S; ++s) {
        const double q = sign * m[s] + z / root_tau[s];
        lo = std::min(lo, q);
        hi = std::max(hi, q);
        mean += sign * m[s];
    }
    mean *= inv_S;
    double y = cornish_fisher_start(m, root_tau, sign, mean, z);
    if (!(y >= lo && y <= hi)) y = std::clamp(y, lo, hi);
    if (!(y >= lo && y <= hi)) y = 0.5 * (lo + hi);  // a NaN start (e.g. zero variance)
    // F(y) - target, with its first and second derivatives (the density and
    // its slope: d/dy phi(t) = -sqrt(tau) t phi(t)).
    auto eval = [&](double y, double& density, double& slope) {
        double cdf = 0.0, pdf = 0.0, dpdf = 0.0;
        for (size_t s = 0; s < S; ++s) {
            const double st = root_tau[s];
            const double t = st * (y - sign * m[s]);
            cdf += normal_cdf(t);
            const double g = st * std::exp(-0.5 * t * t);
            pdf += g;
            dpdf -= st * t * g;
        }
        const double scale = inv_S / std::sqrt(2.0 * std::numbers::pi);
        density = pdf * scale;
        slope = dpdf * scale;
        return cdf * inv_S - target;
    };
    // The bracket is exact in real arithmetic; each component quantile is
    // off by a few roundings (a few 2^-53 relative), so a margin of 1e-12
    // relative holds the root without evaluating F at the ends.
    lo -= 1e-12 * (1.0 + std::abs(lo));
    hi += 1e-12 * (1.0 + std::abs(hi));
    for (int iter = 0; iter < 200; ++iter) {
        const double tol = 1e-11 * (1.0 + std::abs(y));
        if (hi - lo <= tol) return 0.5 * (lo + hi);
        double dens, slope;
        const double f = eval(y, dens, slope);
        if (f == 0.0) return y;
        (f < 0.0 ? lo : hi) = y;
        // Halley's step (cubic convergence; Press et al., Numerical Recipes,
        // 3rd ed., section 9.4, recalled from memory), Newton's where its denominator is not
        // positive, bisection where either leaves the bracket.
        const double halley = 2.0 * dens * dens - f * slope;
        double next = dens > 0.0 ? (halley > 0.0 ? y - 2.0 * f * dens / halley : y - f / dens)
                                 : std::numeric_limits<double>::quiet_NaN();
        // A step below the tolerance ends the search even when it lands on a
        // bound: at the root F is only known to a few roundings, so its sign
        // there is noise and must not send the search back to bisection.
        if (std::abs(next - y) <= tol) return std::clamp(next, lo, hi);
        if (!(next > lo && next < hi)) next = 0.5 * (lo + hi);
        if (std::abs(next - y) <= tol) return next;
        y = next;
    }
    return y;
}

template <class Precision>
double sd_of(std::span<const double> m, std::span<const Precision> tau) {
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

template <class Precision>
double cdf_of(std::span<const double> m, std::span<const Precision> tau, double x) {
    check_sizes(m, tau);
    double sum = 0.0;
    for (size_t s = 0; s < m.size(); ++s)
        sum += normal_cdf(std::sqrt(static_cast<double>(tau[s])) * (x - m[s]));
    return sum / static_cast<double>(m.size());
}

template <class Precision>
double quantile_of(std::span<const double> m, std::span<const Precision> tau, double p) {
    check_sizes(m, tau);
    if (!(p > 0.0 && p < 1.0))
        throw std::invalid_argument("mixture quantile needs a probability strictly between 0 and 1, got " +
                                    std::to_string(p));
    if (p <= 0.5) return solve_mixture_cdf(m, tau, 1.0, p);
    return -solve_mixture_cdf(m, tau, -1.0, 1.0 - p);
}

}  // namespace

double mixture_mean(std::span<const double> m) {
    if (m.empty()) throw std::invalid_argument("mixture needs at least one component");
    double sum = 0.0;
    for (double v : m) sum += v;
    return sum / static_cast<double>(m.size());
}

double mixture_sd(std::span<const double> m, std::span<const float> tau) { return sd_of(m, tau); }
double mixture_sd(std::span<const double> m, std::span<const double> precision) { return sd_of(m, precision); }
double mixture_cdf(std::span<const double> m, std::span<const float> tau, double x) { return cdf_of(m, tau, x); }
double mixture_cdf(std::span<const double> m, std::span<const double> precision, double x) {
    return cdf_of(m, precision, x);
}
double mixture_quantile(std::span<const double> m, std::span<const float> tau, double p) {
    return quantile_of(m, tau, p);
}
double mixture_quantile(std::span<const double> m, std::span<const double> precision, double p) {
    return quantile_of(m, precision, p);
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
