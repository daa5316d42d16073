// A deliberately plain second implementation of the posterior predictive
// mixture (equal-weight mixture over samples of Normal(m_s, 1/tau_s)): CDF by
// erfc, quantile by 100 bisection steps. Tests of the sampler use it so that
// their coverage figures do not depend on model/predict/mixture.cpp.
#pragma once
#include <algorithm>
#include <cmath>
#include <vector>

namespace credence::testing {

inline double reference_mixture_cdf(const std::vector<double>& m, const std::vector<double>& tau, double x) {
    double c = 0.0;
    for (size_t s = 0; s < m.size(); ++s) c += 0.5 * std::erfc(-(x - m[s]) * std::sqrt(tau[s] / 2.0));
    return c / double(m.size());
}

inline double reference_mixture_quantile(const std::vector<double>& m, const std::vector<double>& tau, double p) {
    double lo = 1e300, hi = -1e300;
    for (size_t s = 0; s < m.size(); ++s) {
        lo = std::min(lo, m[s] - 10.0 / std::sqrt(tau[s]));
        hi = std::max(hi, m[s] + 10.0 / std::sqrt(tau[s]));
    }
    for (int it = 0; it < 100; ++it) {
        const double mid = 0.5 * (lo + hi);
        (reference_mixture_cdf(m, tau, mid) < p ? lo : hi) = mid;
    }
    return 0.5 * (lo + hi);
}

}  // namespace credence::testing
