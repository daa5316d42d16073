// Tests for the mixture helpers (model/predict/mixture.cpp, declared in
// model/predict/predict.hpp), against scipy and published normal percentage points.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <sstream>
#include <stdexcept>
#include <vector>

#include "model/predict/predict.hpp"
#include "model/math/random.hpp"
#include "tests/support/scipy_reference.hpp"

using namespace credence;

namespace {

struct Mixture {
    std::vector<double> m;
    std::vector<float> tau;
};

const std::vector<double> kProbabilities = {1e-6, 0.001, 0.025, 0.05, 0.1, 0.3, 0.5, 0.7, 0.9, 0.95, 0.975, 0.999,
                                            1 - 1e-6};

std::vector<Mixture> test_mixtures() {
    std::vector<Mixture> out;
    out.push_back({{2.5}, {0.25f}});                        // one component: Normal(2.5, sd 2)
    out.push_back({{-3.0, 4.0}, {1.0f, 4.0f}});             // two separated modes
    out.push_back({{3.9, 4.1, 4.05}, {30.0f, 0.5f, 2.0f}});  // shared centre, mixed spreads
    Rng rng(2024);
    Mixture many;  // 100 posterior-like components
    for (int s = 0; s < 100; ++s) {
        many.m.push_back(3.6 + 0.3 * rng.normal());
        many.tau.push_back(static_cast<float>(1.5 + rng.uniform()));
    }
    out.push_back(many);
    return out;
}

}  // namespace

TEST_CASE("a one-component mixture has the normal's published percentage points") {
    // Abramowitz & Stegun, Handbook of Mathematical Functions, Table 26.5
    // (upper-tail percentage points, 9 decimals); the same values come out of
    // scipy.stats.norm.ppf. A one-component mixture is Normal(mu, sigma^2), so
    // its p quantile is mu + sigma * z_p.
    const std::vector<std::pair<double, double>> table = {
        {0.1, 1.281551566}, {0.05, 1.644853627}, {0.025, 1.959963985}, {0.01, 2.326347874},
        {0.005, 2.575829304}, {0.001, 3.090232306}};
    const std::vector<double> m{1.5};
    const std::vector<float> tau{0.25f};  // sd 2
    for (auto [tail, x] : table) {
        CHECK(mixture_quantile(m, tau, 1.0 - tail) == Approx(1.5 + 2.0 * x).margin(2e-9));
        CHECK(mixture_quantile(m, tau, tail) == Approx(1.5 - 2.0 * x).margin(2e-9));
    }
    CHECK(mixture_quantile(m, tau, 0.5) == Approx(1.5).margin(1e-12));
}

TEST_CASE("mixture moments, CDF, density and quantiles agree with scipy") {
    // Outside reference: scipy. Moments by numerical integration
    // (scipy.integrate.quad over the mixture density), CDF as the mean of
    // scipy.stats.norm.cdf, log density by scipy.special.logsumexp over
    // scipy.stats.norm.logpdf, quantiles by scipy.optimize.brentq on that CDF.
    const char* program = R"PY(
import sys
import numpy as np
from scipy import stats, integrate, optimize, special
lines = sys.stdin.read().strip().split("\n")
probs = [float(v) for v in lines[0].split()]
for line in lines[1:]:
    v = [float(x) for x in line.split()]
    S = int(v[0]); m = np.array(v[1:1+S]); tau = np.array(v[1+S:1+2*S]); sd = 1/np.sqrt(tau)
    pdf = lambda x: np.mean(stats.norm.pdf(x, m, sd))
    cdf = lambda x: np.mean(stats.norm.cdf(x, m, sd))
    lo, hi = m.min() - 12*sd.max(), m.max() + 12*sd.max()
    pts = sorted(set(np.round(m, 6)))[:50]
    mean = integrate.quad(lambda x: x*pdf(x), lo, hi, points=pts, limit=500, epsabs=1e-13, epsrel=1e-13)[0]
    var = integrate.quad(lambda x: (x-mean)**2*pdf(x), lo, hi, points=pts, limit=500, epsabs=1e-13, epsrel=1e-13)[0]
    out = [mean, np.sqrt(var)]
    for x in (m.min() - 1, np.median(m), m.max() + 0.5):
        out += [x, cdf(x), special.logsumexp(stats.norm.logpdf(x, m, sd)) - np.log(S)]
    for p in probs:
        out.append(optimize.brentq(lambda x: cdf(x) - p, lo - 20*sd.max(), hi + 20*sd.max(), xtol=1e-14, rtol=1e-15, maxiter=500))
    print(" ".join(repr(float(o)) for o in out))
)PY";
    const auto mixtures = test_mixtures();
    std::ostringstream in;
    in.precision(17);
    for (double p : kProbabilities) in << p << ' ';
    in << '\n';
    for (const auto& mix : mixtures) {
        in << mix.m.size();
        for (double v : mix.m) in << ' ' << v;
        for (float t : mix.tau) in << ' ' << static_cast<double>(t);
        in << '\n';
    }
    const auto ref = testing::run_scipy("mixture", program, in.str());
    if (!ref) return;
    const size_t per_line = 2 + 9 + kProbabilities.size();
    REQUIRE(ref->size() == mixtures.size() * per_line);
    for (size_t k = 0; k < mixtures.size(); ++k) {
        INFO("mixture " << k);
        const auto& mix = mixtures[k];
        const double* r = ref->data() + k * per_line;
        // quad with epsabs 1e-13 on a smooth density: 1e-8 is generous.
        CHECK(mixture_mean(mix.m) == Approx(r[0]).margin(1e-8));
        CHECK(mixture_sd(mix.m, mix.tau) == Approx(r[1]).margin(1e-8));
        for (int j = 0; j < 3; ++j) {
            const double x = r[2 + 3 * j];
            CHECK(mixture_cdf(mix.m, mix.tau, x) == Approx(r[3 + 3 * j]).margin(1e-13));
            CHECK(mixture_log_density(mix.m, mix.tau, x) == Approx(r[4 + 3 * j]).margin(1e-11));
        }
        for (size_t j = 0; j < kProbabilities.size(); ++j) {
            INFO("p = " << kProbabilities[j]);
            // The engine promises quantiles to about 1e-9.
            CHECK(mixture_quantile(mix.m, mix.tau, kProbabilities[j]) == Approx(r[11 + j]).margin(1e-9));
        }
    }
}

TEST_CASE("mixture quantile inverts the mixture CDF and is monotone") {
    Rng rng(77);
    for (int trial = 0; trial < 200; ++trial) {
        const int S = 1 + static_cast<int>(rng.below(60));
        std::vector<double> m(S);
        std::vector<float> tau(S);
        for (int s = 0; s < S; ++s) {
            m[s] = 3.0 + (trial % 3 + 0.2) * rng.normal();
            tau[s] = static_cast<float>(0.05 + 10.0 * rng.uniform());
        }
        double previous = -INFINITY;
        for (double p : kProbabilities) {
            const double q = mixture_quantile(m, tau, p);
            // F is continuous and strictly increasing, so F(q) = p; 1e-12 is
            // the solver tolerance times the largest density, with margin.
            CHECK(mixture_cdf(m, tau, q) == Approx(p).margin(1e-11));
            CHECK(q > previous);
            previous = q;
        }
    }
}

TEST_CASE("mixture helpers reject malformed input") {
    const std::vector<double> m{1.0, 2.0};
    const std::vector<float> tau{1.0f};
    CHECK_THROWS_AS(mixture_sd(m, tau), std::invalid_argument);
    CHECK_THROWS_AS(mixture_quantile(m, std::vector<float>{1.0f, 1.0f}, 1.0), std::invalid_argument);
    CHECK_THROWS_AS(mixture_quantile(m, std::vector<float>{1.0f, 1.0f}, 0.0), std::invalid_argument);
    CHECK_THROWS_AS(mixture_mean(std::vector<double>{}), std::invalid_argument);
}

// The visitor fold-in passes per-component precisions in double (each
// component's own variance). With precisions that a float holds exactly, the
// double entry points must give the float ones' answers bit for bit (one
// implementation); a precision a float cannot hold is checked against the
// normal's closed-form quantile.
TEST_CASE("mixtures with double precisions answer as with float ones, and per-component variances count") {
    Rng rng(31);
    std::vector<double> m;
    std::vector<float> tau;
    std::vector<double> precision;
    for (int s = 0; s < 40; ++s) {
        m.push_back(3.0 + rng.normal());
        tau.push_back(static_cast<float>(0.5 + rng.uniform()));
        precision.push_back(tau.back());
    }
    CHECK(mixture_sd(m, precision) == mixture_sd(m, tau));
    CHECK(mixture_cdf(m, precision, 3.3) == mixture_cdf(m, tau, 3.3));
    for (double p : {0.05, 0.3, 0.5, 0.9})
        CHECK(mixture_quantile(m, precision, p) == mixture_quantile(m, tau, p));
    // One component with precision 1/(0.1^2 + 0.3^2) that float cannot hold
    // exactly: its 95% point is mean + 1.6448536 sd (standard normal table,
    // recalled from memory).
    const double variance = 0.01 + 0.09;
    const std::vector<double> one = {2.0}, one_precision = {1.0 / variance};
    CHECK(mixture_quantile(one, one_precision, 0.95) == Approx(2.0 + 1.6448536 * std::sqrt(variance)).epsilon(1e-8));
    CHECK(mixture_sd(one, one_precision) == Approx(std::sqrt(variance)).epsilon(1e-14));
    CHECK_THROWS_AS(mixture_quantile(one, std::vector<double>{}, 0.5), std::invalid_argument);
}
