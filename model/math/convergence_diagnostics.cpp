#include "model/math/convergence_diagnostics.hpp"

#include <algorithm>
#include <cmath>
#include <complex>
#include <limits>
#include <numbers>
#include <numeric>
#include <stdexcept>
#include <string>

#include "model/math/standard_normal.hpp"

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// In-place iterative radix-2 Cooley-Tukey FFT; a.size() must be a power of two.
// inverse = true computes the unscaled inverse transform.
void fft(std::vector<std::complex<double>>& a, bool inverse) {
    const size_t n = a.size();
    for (size_t i = 1, j = 0; i < n; ++i) {  // bit-reversal permutation
        size_t bit = n >> 1;
        for (; j & bit; bit >>= 1) j ^= bit;
        j ^= bit;
        if (i < j) std::swap(a[i], a[j]);
    }
    for (size_t len = 2; len <= n; len <<= 1) {
        const double angle = 2.0 * std::numbers::pi / static_cast<double>(len) * (inverse ? 1.0 : -1.0);
        const std::complex<double> step(std::cos(angle), std::sin(angle));
        for (size_t start = 0; start < n; start += len) {
            std::complex<double> w(1.0, 0.0);
            for (size_t k = 0; k < len / 2; ++k) {
                const auto u = a[start + k];
                const auto v = a[start + k + len / 2] * w;
                a[start + k] = u + v;
                a[start + k + len / 2] = u - v;
                w *= step;
            }
        }
    }
}

void check_shape(const ChainDraws& chains, size_t min_chains, size_t min_length, const char* who) {
    if (chains.size() < min_chains)
        throw std::invalid_argument(std::string(who) + ": needs at least " + std::to_string(min_chains) +
                        " chain(s), got " + std::to_string(chains.size()));
    const size_t n = chains.front().size();
    for (size_t m = 0; m < chains.size(); ++m)
        if (chains[m].size() != n)
            throw std::invalid_argument(std::string(who) + ": chain " + std::to_string(m) + " has " +
                            std::to_string(chains[m].size()) + " draws but chain 0 has " +
                            std::to_string(n) + "; all chains must be the same length");
    if (n < min_length)
        throw std::invalid_argument(std::string(who) + ": needs at least " + std::to_string(min_length) +
                        " draws per chain, got " + std::to_string(n) +
                        "; keep more samples per chain");
}

std::vector<double> pooled(const ChainDraws& chains) {
    std::vector<double> all;
    all.reserve(chains.size() * chains.front().size());
    for (const auto& c : chains) all.insert(all.end(), c.begin(), c.end());
    return all;
}

double mean_of(const std::vector<double>& x) {
    return std::accumulate(x.begin(), x.end(), 0.0) / static_cast<double>(x.size());
}

// W, var+ of equal-length chains (see the header).
struct VarianceParts {
    double within = 0.0;    // W
    double var_plus = 0.0;  // (N-1)/N W + B/N
};

VarianceParts variance_parts(const ChainDraws& chains) {
    const size_t M = chains.size(), N = chains.front().size();
    std::vector<double> means(M);
    double within = 0.0;
    for (size_t m = 0; m < M; ++m) {
        means[m] = mean_of(chains[m]);
        double ss = 0.0;
        for (double x : chains[m]) ss += (x - means[m]) * (x - means[m]);
        within += ss / static_cast<double>(N - 1);
    }
    within /= static_cast<double>(M);
    const double grand = mean_of(means);
    double b_over_n = 0.0;
    for (double mu : means) b_over_n += (mu - grand) * (mu - grand);
    b_over_n /= static_cast<double>(M - 1);
    const double n = static_cast<double>(N);
    return {within, (n - 1.0) / n * within + b_over_n};
}

// Defined-value maximum / minimum: NaN only when both are NaN.
double max_defined(double a, double b) {
    if (std::isnan(a)) return b;
    if (std::isnan(b)) return a;
    return std::max(a, b);
}
double min_defined(double a, double b) {
    if (std::isnan(a)) return b;
    if (std::isnan(b)) return a;
    return std::min(a, b);
}

ChainDraws map_draws(const ChainDraws& chains, auto f) {
    ChainDraws out = chains;
    for (auto& c : out)
        for (double& x : c) x = f(x);
    return out;
}

}  // namespace

std::vector<double> autocovariance(std::span<const double> x) {
    const size_t n = x.size();
    if (n == 0) throw std::invalid_argument("autocovariance: needs at least one value");
    double mean = 0.0;
    for (double v : x) mean += v;
    mean /= static_cast<double>(n);
    // Padding to >= 2n makes the circular correlation equal the linear one.
    size_t len = 1;
    while (len < 2 * n) len <<= 1;
    std::vector<std::complex<double>> a(len, {0.0, 0.0});
    for (size_t i = 0; i < n; ++i) a[i] = {x[i] - mean, 0.0};
    fft(a, false);
    for (auto& v : a) v = {std::norm(v), 0.0};
    fft(a, true);
    std::vector<double> acov(n);
    const double scale = 1.0 / (static_cast<double>(len) * static_cast<double>(n));
    for (size_t t = 0; t < n; ++t) acov[t] = a[t].real() * scale;
    return acov;
}

double quantile_linear(std::vector<double> values, double p) {
    if (values.empty()) throw std::invalid_argument("quantile_linear: needs at least one value");
    if (!(p >= 0.0 && p <= 1.0))
        throw std::invalid_argument("quantile_linear: probability " + std::to_string(p) + " is outside [0, 1]");
    const double h = static_cast<double>(values.size() - 1) * p;
    const size_t lo = static_cast<size_t>(std::floor(h));
    std::nth_element(values.begin(), values.begin() + static_cast<std::ptrdiff_t>(lo), values.end());
    const double x_lo = values[lo];
    if (lo + 1 >= values.size()) return x_lo;
    const double x_hi = *std::min_element(values.begin() + static_cast<std::ptrdiff_t>(lo) + 1, values.end());
    return x_lo + (h - static_cast<double>(lo)) * (x_hi - x_lo);
}

ChainDraws split_chains(const ChainDraws& draws_by_chain) {
    check_shape(draws_by_chain, 1, 4, "split_chains");
    const size_t n = draws_by_chain.front().size(), half = n / 2;
    ChainDraws out;
    out.reserve(2 * draws_by_chain.size());
    for (const auto& c : draws_by_chain) {
        out.emplace_back(c.begin(), c.begin() + static_cast<std::ptrdiff_t>(half));
        out.emplace_back(c.end() - static_cast<std::ptrdiff_t>(half), c.end());
    }
    return out;
}

ChainDraws rank_normalize(const ChainDraws& chains) {
    check_shape(chains, 1, 1, "rank_normalize");
    const size_t N = chains.front().size(), S = chains.size() * N;
    const std::vector<double> all = pooled(chains);
    std::vector<size_t> order(S);
    std::iota(order.begin(), order.end(), size_t{0});
    std::stable_sort(order.begin(), order.end(), [&](size_t a, size_t b) { return all[a] < all[b]; });
    std::vector<double> z(S);
    const double denom = static_cast<double>(S) + 0.25;
    for (size_t i = 0; i < S;) {
        size_t j = i;
        while (j + 1 < S && all[order[j + 1]] == all[order[i]]) ++j;
        // Positions i..j (0-based) tie: average 1-based rank is (i + j)/2 + 1.
        const double rank = 0.5 * static_cast<double>(i + j) + 1.0;
        const double zi = normal_quantile((rank - 0.375) / denom);
        for (size_t k = i; k <= j; ++k) z[order[k]] = zi;
        i = j + 1;
    }
    ChainDraws out(chains.size(), std::vector<double>(N));
    for (size_t m = 0; m < chains.size(); ++m)
        std::copy(z.begin() + static_cast<std::ptrdiff_t>(m * N),
                  z.begin() + static_cast<std::ptrdiff_t>((m + 1) * N), out[m].begin());
    return out;
}

double rhat_basic(const ChainDraws& chains) {
    check_shape(chains, 2, 2, "rhat_basic");
    const VarianceParts v = variance_parts(chains);
    if (v.within == 0.0) return v.var_plus == 0.0 ? kNaN : std::numeric_limits<double>::infinity();
    return std::sqrt(v.var_plus / v.within);
}

double ess_basic(const ChainDraws& chains) {
    check_shape(chains, 2, 2, "ess_basic");
    const size_t M = chains.size(), N = chains.front().size();
    const VarianceParts v = variance_parts(chains);
    if (!(v.var_plus > 0.0)) return kNaN;

    // mean_m s_m^2 rho_{t,m} = mean_m acov_m(t) * N/(N-1): no division by a
    // chain's own variance, so constant chains need no special case.
    std::vector<double> mean_acov(N, 0.0);
    for (const auto& c : chains) {
        const auto acov = autocovariance(c);
        for (size_t t = 0; t < N; ++t) mean_acov[t] += acov[t];
    }
    const double to_unbiased = static_cast<double>(N) / static_cast<double>(N - 1) / static_cast<double>(M);
    auto rho = [&](size_t t) { return 1.0 - (v.within - mean_acov[t] * to_unbiased) / v.var_plus; };

    // Geyer's initial monotone sequence over pairs (rho_{2k}, rho_{2k+1}).
    double sum_pairs = rho(0) + rho(1);
    double previous = sum_pairs;
    for (size_t k = 1; 2 * k + 1 < N; ++k) {
        double pair = rho(2 * k) + rho(2 * k + 1);
        if (pair < 0.0) break;
        pair = std::min(pair, previous);
        sum_pairs += pair;
        previous = pair;
    }
    const double S = static_cast<double>(M * N);
    const double tau = std::max(-1.0 + 2.0 * sum_pairs, 1.0 / std::log10(S));
    return S / tau;
}

ConvergenceStats convergence(const ChainDraws& draws_by_chain) {
    const ChainDraws split = split_chains(draws_by_chain);
    const std::vector<double> all = pooled(split);
    const bool all_finite = std::all_of(all.begin(), all.end(), [](double x) { return std::isfinite(x); });
    const bool constant = std::all_of(all.begin(), all.end(), [&](double x) { return x == all.front(); });
    if (!all_finite || constant) return {kNaN, kNaN, kNaN};

    const ChainDraws z = rank_normalize(split);
    const double median = quantile_linear(all, 0.5);
    const ChainDraws folded = rank_normalize(map_draws(split, [&](double x) { return std::abs(x - median); }));

    ConvergenceStats stats;
    stats.rhat = max_defined(rhat_basic(z), rhat_basic(folded));
    stats.ess_bulk = ess_basic(z);
    const double q05 = quantile_linear(all, 0.05), q95 = quantile_linear(all, 0.95);
    const double ess_lower = ess_basic(map_draws(split, [&](double x) { return x <= q05 ? 1.0 : 0.0; }));
    const double ess_upper = ess_basic(map_draws(split, [&](double x) { return x <= q95 ? 1.0 : 0.0; }));
    stats.ess_tail = min_defined(ess_lower, ess_upper);
    return stats;
}

}  // namespace credence
