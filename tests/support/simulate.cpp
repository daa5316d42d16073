#include "tests/support/simulate.hpp"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <numeric>
#include <stdexcept>
#include <string>
#include <unordered_set>

#include "model/math/random.hpp"

namespace credence {

double SimulatedData::true_mean(uint32_t u, uint32_t i) const {
    const size_t k = user_factors.size() / ratings.users.size();
    double dot = 0.0;
    for (size_t j = 0; j < k; ++j) dot += double(user_factors[u * k + j]) * item_factors[i * k + j];
    return global_mean + user_bias[u] + item_bias[i] + dot;
}

namespace {
std::string shop_id(const char* prefix, uint32_t n) {
    char buf[32];
    std::snprintf(buf, sizeof buf, "%s-%06u", prefix, n);
    return buf;
}
}  // namespace

SimulatedData simulate_ratings(const SimulationOptions& o) {
    if (o.users == 0 || o.items == 0 || o.rank == 0) throw std::invalid_argument("simulate: users, items and rank must be positive");
    if (o.ratings_per_user == 0 && !(o.density > 0.0 && o.density <= 1.0))
        throw std::invalid_argument("simulate: density must be in (0, 1]");
    if (o.ratings_per_user > o.items) throw std::invalid_argument("simulate: ratings_per_user exceeds the number of items");
    if (!(o.noise_sd >= 0.0) || !(o.factor_sd >= 0.0) || !(o.bias_sd >= 0.0))
        throw std::invalid_argument("simulate: standard deviations must be non-negative");

    SimulatedData d;
    d.global_mean = o.global_mean;
    const uint32_t K = o.rank;
    const double fsd = o.factor_sd / std::sqrt(std::sqrt(double(K)));
    d.user_factors.resize(size_t(o.users) * K);
    d.item_factors.resize(size_t(o.items) * K);
    d.user_bias.assign(o.users, 0.0f);
    d.item_bias.assign(o.items, 0.0f);
    // Row keys: users 0..U-1, items 2^32 + i, rating pattern and noise 2^33 + u.
    for (uint32_t u = 0; u < o.users; ++u) {
        Rng rng = Rng::keyed(o.seed, 0, 0, StreamBlock::simulate, u);
        for (uint32_t k = 0; k < K; ++k) d.user_factors[size_t(u) * K + k] = float(fsd * rng.normal());
        d.user_bias[u] = float(o.bias_sd * rng.normal());
    }
    for (uint32_t i = 0; i < o.items; ++i) {
        Rng rng = Rng::keyed(o.seed, 0, 0, StreamBlock::simulate, (uint64_t(1) << 32) + i);
        for (uint32_t k = 0; k < K; ++k) d.item_factors[size_t(i) * K + k] = float(fsd * rng.normal());
        d.item_bias[i] = float(o.bias_sd * rng.normal());
    }
    for (uint32_t u = 0; u < o.users; ++u) d.ratings.users.intern(shop_id("customer", u));
    for (uint32_t i = 0; i < o.items; ++i) d.ratings.items.intern(shop_id("product", i));

    std::vector<uint32_t> chosen;
    float lo = std::numeric_limits<float>::max(), hi = std::numeric_limits<float>::lowest();
    for (uint32_t u = 0; u < o.users; ++u) {
        Rng rng = Rng::keyed(o.seed, 0, 0, StreamBlock::simulate, (uint64_t(2) << 32) + u);
        chosen.clear();
        if (o.ratings_per_user > 0) {
            // Floyd's algorithm: a uniform subset of size m without a full shuffle.
            std::unordered_set<uint32_t> set;
            for (uint32_t j = o.items - o.ratings_per_user; j < o.items; ++j) {
                const auto t = static_cast<uint32_t>(rng.below(uint64_t(j) + 1));
                set.insert(set.count(t) ? j : t);
            }
            chosen.assign(set.begin(), set.end());
            std::sort(chosen.begin(), chosen.end());
        } else if (o.density >= 1.0) {
            chosen.resize(o.items);
            std::iota(chosen.begin(), chosen.end(), 0u);
        } else {
            // Geometric skips: the gap to the next rated item is Geometric(density).
            const double log_q = std::log1p(-o.density);
            double pos = -1.0;
            for (;;) {
                pos += 1.0 + std::floor(std::log(rng.uniform()) / log_q);
                if (pos >= o.items) break;
                chosen.push_back(static_cast<uint32_t>(pos));
            }
        }
        for (uint32_t i : chosen) {
            const float v = float(d.true_mean(u, i) + o.noise_sd * rng.normal());
            d.ratings.ratings.push_back({u, i, v});
            lo = std::min(lo, v);
            hi = std::max(hi, v);
        }
    }
    if (d.ratings.ratings.empty()) throw std::invalid_argument("simulate: no ratings drawn; raise density");
    d.ratings.scale = {lo, hi, false};
    return d;
}


namespace {

std::string numbered_id(const std::string& prefix, uint32_t digits, uint32_t n) {
    char buf[32];
    std::snprintf(buf, sizeof buf, "-%0*u", static_cast<int>(digits), n);
    return prefix + buf;
}

void name_rows(Posterior& p, const SimulatedPosteriorOptions& o) {
    static const char* const kGoods[] = {"teapot", "lantern", "wool-scarf", "cedar-box", "ink-set", "\xc3\xb6ko-mug"};
    for (uint32_t u = 0; u < o.users; ++u)
        p.user_ids.push_back(o.id_style == SimulatedIdStyle::goods ? "customer-" + std::to_string(1000 + u)
                                                                   : numbered_id(o.user_prefix, o.id_digits, u));
    for (uint32_t i = 0; i < o.items; ++i)
        p.item_ids.push_back(o.id_style == SimulatedIdStyle::goods ? std::string(kGoods[i % 6]) + "-" + std::to_string(i)
                                                                   : numbered_id(o.item_prefix, o.id_digits, i));
}

// Zero factors, biases and mu; tau = 1; identity Lambda; nothing rated.
void zero_fill(Posterior& p) {
    const size_t S = p.num_samples, U = p.num_users, I = p.num_items, K = p.rank;
    p.user_factors.assign(S * U * K, 0.0f);
    p.item_factors.assign(S * I * K, 0.0f);
    if (p.has_biases) {
        p.user_bias.assign(S * U, 0.0f);
        p.item_bias.assign(S * I, 0.0f);
        p.user_bias_precision.assign(S, 1.0f);
        p.item_bias_precision.assign(S, 1.0f);
    }
    p.noise_precision.assign(S, 1.0f);
    p.user_mu.assign(S * K, 0.0f);
    p.item_mu.assign(S * K, 0.0f);
    p.user_lambda.assign(S * K * K, 0.0f);
    p.item_lambda.assign(S * K * K, 0.0f);
    for (size_t s = 0; s < S; ++s)
        for (size_t k = 0; k < K; ++k) {
            p.user_lambda[(s * K + k) * K + k] = 1.0f;
            p.item_lambda[(s * K + k) * K + k] = 1.0f;
        }
    p.rated_offsets.assign(U + 1, 0);
    p.rated_items.clear();
}

// Overwrites the zero fill with random values. The draw order (factors,
// biases, tau, rated items, then hyperparameters) is part of the contract
// "same options -> same posterior"; keep it when adding fields.
void random_fill(Posterior& p, const SimulatedPosteriorOptions& o) {
    Rng rng(o.seed);
    const size_t S = p.num_samples, U = p.num_users, I = p.num_items, K = p.rank;
    auto fill = [&](std::vector<float>& dst, size_t rows, size_t width, double centre_sd) {
        std::vector<double> centre(rows * width);
        for (auto& c : centre) c = centre_sd * rng.normal();
        for (size_t s = 0; s < S; ++s)
            for (size_t r = 0; r < rows * width; ++r)
                dst[s * rows * width + r] = static_cast<float>(centre[r] + o.jitter_sd * rng.normal());
    };
    fill(p.user_factors, U, K, o.factor_sd);
    fill(p.item_factors, I, K, o.factor_sd);
    if (p.has_biases) {
        fill(p.user_bias, U, 1, o.bias_sd);
        fill(p.item_bias, I, 1, o.bias_sd);
    }
    for (size_t s = 0; s < S; ++s)
        p.noise_precision[s] = static_cast<float>(o.noise_precision * (0.8 + 0.4 * rng.uniform()));
    const uint32_t d = o.duplicate_items;
    for (size_t s = 0; s < S; ++s)
        for (uint32_t j = 0; j < d; ++j) {
            const size_t to = I - d + j;
            std::copy_n(p.item_factors.begin() + static_cast<std::ptrdiff_t>((s * I + j) * K), K,
                        p.item_factors.begin() + static_cast<std::ptrdiff_t>((s * I + to) * K));
            if (p.has_biases) p.item_bias[s * I + to] = p.item_bias[s * I + j];
        }
    for (uint32_t u = 0; u < U; ++u) {
        for (uint32_t i = 0; i < I; ++i)
            if (rng.uniform() < o.rated_fraction) p.rated_items.push_back(i);
        p.rated_offsets[u + 1] = p.rated_items.size();
    }
    auto hyper = [&](std::vector<float>& mu, std::vector<float>& lambda) {
        for (auto& m : mu) m = static_cast<float>(0.1 * rng.normal());
        for (size_t s = 0; s < S; ++s) {
            float* L = lambda.data() + s * K * K;
            for (size_t a = 0; a < K; ++a)
                for (size_t b = 0; b < a; ++b)
                    L[a * K + b] = L[b * K + a] = static_cast<float>(0.2 * (rng.uniform() - 0.5));
            // |off-diagonal| < 0.1 each, diagonal > 3: diagonally dominant, so positive definite.
            for (size_t a = 0; a < K; ++a) L[a * K + a] = static_cast<float>(3.0 + rng.uniform() + 0.2 * K);
        }
    };
    hyper(p.user_mu, p.user_lambda);
    hyper(p.item_mu, p.item_lambda);
    if (p.has_biases)
        for (size_t s = 0; s < S; ++s) {
            p.user_bias_precision[s] = static_cast<float>(8.0 + rng.uniform());
            p.item_bias_precision[s] = static_cast<float>(8.0 + rng.uniform());
        }
}

}  // namespace

Posterior simulate_posterior(const SimulatedPosteriorOptions& o) {
    if (o.samples == 0 || o.rank == 0)
        throw std::invalid_argument("simulate_posterior: samples and rank must be positive");
    if (o.chains == 0 || o.chains > o.samples)
        throw std::invalid_argument("simulate_posterior: chains must be between 1 and the number of samples");
    if (!(o.rated_fraction >= 0.0 && o.rated_fraction <= 1.0))
        throw std::invalid_argument("simulate_posterior: rated_fraction must be in [0, 1]");
    if (o.factor_sd < 0 || o.jitter_sd < 0 || o.bias_sd < 0 || !(o.noise_precision > 0))
        throw std::invalid_argument("simulate_posterior: sds must be non-negative and noise_precision positive");
    if (o.duplicate_items > o.items / 2)
        throw std::invalid_argument("simulate_posterior: duplicate_items " + std::to_string(o.duplicate_items) +
                                    " exceeds half the items (" + std::to_string(o.items) + ")");
    Posterior p;
    p.rank = o.rank;
    p.num_users = o.users;
    p.num_items = o.items;
    p.num_samples = o.samples;
    p.num_chains = o.chains;
    p.has_biases = o.biases;
    name_rows(p, o);
    p.global_mean = o.global_mean;
    p.scale = o.scale;
    for (uint32_t s = 0; s < o.samples; ++s)
        p.sample_chain.push_back(static_cast<uint32_t>(static_cast<uint64_t>(s) * o.chains / o.samples));
    zero_fill(p);
    if (!o.zero_values) random_fill(p, o);
    p.fit_metadata_json = o.fit_metadata_json.empty()
                              ? R"({"generator":"synthetic","seed":)" + std::to_string(o.seed) + "}"
                              : o.fit_metadata_json;
    p.diagnostics_json = o.diagnostics_json.empty() ? R"({"verdict":"not assessed"})" : o.diagnostics_json;
    p.validate();
    return p;
}

}  // namespace credence
