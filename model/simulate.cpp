#include "model/simulate.hpp"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <numeric>
#include <stdexcept>
#include <string>
#include <unordered_set>

#include "model/random.hpp"

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


}  // namespace credence
