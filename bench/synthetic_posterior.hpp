// A random but valid Posterior for server tests and the serving benchmark:
// the invented shop's customers ("cust-00042") and products ("sku-00042"),
// factors drawn around a per-row centre with per-sample jitter (so samples
// disagree as real posterior draws do), SPD hyperparameter precisions, and a
// random set of rated items per customer. Same spec -> identical posterior.
#pragma once
#include <cstdint>
#include <cstdio>
#include <string>
#include <vector>

#include "model/posterior.hpp"
#include "model/random.hpp"

namespace credence::bench {

struct SyntheticSpec {
    uint32_t users = 50;
    uint32_t items = 200;
    uint32_t rank = 4;
    uint32_t samples = 20;
    uint32_t chains = 2;
    bool biases = true;
    double rated_fraction = 0.05;
    uint64_t seed = 1;
    std::string item_prefix = "sku";
};

inline std::string synthetic_id(const std::string& prefix, uint32_t index) {
    char buf[32];
    std::snprintf(buf, sizeof buf, "-%05u", index);
    return prefix + buf;
}

inline Posterior synthetic_posterior(const SyntheticSpec& spec) {
    Rng rng(spec.seed);
    const size_t S = spec.samples, U = spec.users, I = spec.items, K = spec.rank;
    Posterior p;
    p.rank = spec.rank;
    p.num_users = spec.users;
    p.num_items = spec.items;
    p.num_samples = spec.samples;
    p.num_chains = spec.chains;
    p.has_biases = spec.biases;
    for (uint32_t u = 0; u < U; ++u) p.user_ids.push_back(synthetic_id("cust", u));
    for (uint32_t i = 0; i < I; ++i) p.item_ids.push_back(synthetic_id(spec.item_prefix, i));
    p.global_mean = 3.6f;
    p.scale = RatingScale{1.0f, 5.0f, true};
    for (uint32_t s = 0; s < S; ++s) p.sample_chain.push_back(static_cast<uint32_t>(s * spec.chains / S));

    auto rows = [&](size_t count, std::vector<float>& out) {
        std::vector<float> centre(count * K);
        for (auto& c : centre) c = static_cast<float>(0.5 * rng.normal());
        out.resize(S * count * K);
        for (size_t s = 0; s < S; ++s)
            for (size_t j = 0; j < count * K; ++j) out[s * count * K + j] = centre[j] + static_cast<float>(0.15 * rng.normal());
    };
    rows(U, p.user_factors);
    rows(I, p.item_factors);
    if (spec.biases) {
        p.user_bias.resize(S * U);
        p.item_bias.resize(S * I);
        for (auto& b : p.user_bias) b = static_cast<float>(0.3 * rng.normal());
        for (auto& b : p.item_bias) b = static_cast<float>(0.3 * rng.normal());
        for (size_t s = 0; s < S; ++s) {
            p.user_bias_precision.push_back(static_cast<float>(8.0 + rng.uniform()));
            p.item_bias_precision.push_back(static_cast<float>(8.0 + rng.uniform()));
        }
    }
    for (size_t s = 0; s < S; ++s) p.noise_precision.push_back(static_cast<float>(1.5 + rng.uniform()));
    // Diagonally dominant symmetric matrices are positive definite.
    auto hyper = [&](std::vector<float>& mu, std::vector<float>& lambda) {
        mu.resize(S * K);
        lambda.assign(S * K * K, 0.0f);
        for (auto& m : mu) m = static_cast<float>(0.1 * rng.normal());
        for (size_t s = 0; s < S; ++s) {
            float* L = lambda.data() + s * K * K;
            for (size_t a = 0; a < K; ++a)
                for (size_t b = 0; b < a; ++b) L[a * K + b] = L[b * K + a] = static_cast<float>(0.2 * (rng.uniform() - 0.5));
            for (size_t a = 0; a < K; ++a) L[a * K + a] = static_cast<float>(3.0 + rng.uniform() + 0.2 * K);
        }
    };
    hyper(p.user_mu, p.user_lambda);
    hyper(p.item_mu, p.item_lambda);
    p.rated_offsets.push_back(0);
    for (uint32_t u = 0; u < U; ++u) {
        for (uint32_t i = 0; i < I; ++i)
            if (rng.uniform() < spec.rated_fraction) p.rated_items.push_back(i);
        p.rated_offsets.push_back(p.rated_items.size());
    }
    p.fit_metadata_json = R"({"generator":"synthetic","seed":)" + std::to_string(spec.seed) + "}";
    p.diagnostics_json = R"({"verdict":"not assessed"})";
    return p;
}

}  // namespace credence::bench
