// Builds small random but valid Posterior objects for tests that need a
// model without running the sampler (file format, prediction, server).
//
//   auto p = credence::testing::make_posterior({.users = 5, .items = 7, .rank = 3,
//                                               .samples = 4, .chains = 2, .biases = true});
//
// Same spec (including seed) -> identical posterior. Values are drawn from
// keyed Rng streams: factors ~ N(0, 0.5^2), biases ~ N(0, 0.3^2), noise
// precision in [1, 5), lambdas symmetric positive definite (diagonally
// dominant), each user rating a random sorted subset of items. Ids come from
// the invented shop scenario, and one item id is non-ASCII UTF-8 to exercise
// id handling. The result always passes Posterior::validate().
#pragma once
#include <cstdint>
#include <string>

#include "model/posterior.hpp"
#include "model/random.hpp"

namespace credence::testing {

struct PosteriorSpec {
    uint32_t users = 4;
    uint32_t items = 6;
    uint32_t rank = 3;
    uint32_t samples = 4;  // kept samples over all chains, split as evenly as possible
    uint32_t chains = 2;
    bool biases = true;
    uint64_t seed = 1;
};

inline Posterior make_posterior(const PosteriorSpec& spec) {
    Rng rng(spec.seed);
    auto normal = [&](double sd) { return static_cast<float>(sd * rng.normal()); };

    Posterior p;
    p.rank = spec.rank;
    p.num_users = spec.users;
    p.num_items = spec.items;
    p.num_samples = spec.samples;
    p.num_chains = spec.chains;
    p.has_biases = spec.biases;

    static const char* const kGoods[] = {"teapot", "lantern", "wool-scarf", "cedar-box", "ink-set", "\xc3\xb6ko-mug"};
    for (uint32_t u = 0; u < spec.users; ++u) p.user_ids.push_back("customer-" + std::to_string(1000 + u));
    for (uint32_t i = 0; i < spec.items; ++i) p.item_ids.push_back(std::string(kGoods[i % 6]) + "-" + std::to_string(i));
    p.global_mean = 3.25f + normal(0.1);
    p.scale = {1.0f, 5.0f, spec.seed % 2 == 0};

    const size_t S = spec.samples, U = spec.users, I = spec.items, K = spec.rank;
    for (size_t s = 0; s < S; ++s) p.sample_chain.push_back(static_cast<uint32_t>(s * spec.chains / S));
    for (size_t n = 0; n < S * U * K; ++n) p.user_factors.push_back(normal(0.5));
    for (size_t n = 0; n < S * I * K; ++n) p.item_factors.push_back(normal(0.5));
    if (spec.biases) {
        for (size_t n = 0; n < S * U; ++n) p.user_bias.push_back(normal(0.3));
        for (size_t n = 0; n < S * I; ++n) p.item_bias.push_back(normal(0.3));
        for (size_t s = 0; s < S; ++s) p.user_bias_precision.push_back(static_cast<float>(1.0 + 4.0 * rng.uniform()));
        for (size_t s = 0; s < S; ++s) p.item_bias_precision.push_back(static_cast<float>(1.0 + 4.0 * rng.uniform()));
    }
    for (size_t s = 0; s < S; ++s) p.noise_precision.push_back(static_cast<float>(1.0 + 4.0 * rng.uniform()));

    auto add_lambda = [&](std::vector<float>& out) {
        // Symmetric with |off-diagonal| < 0.1 and diagonal >= K: diagonally dominant, so positive definite.
        std::vector<float> m(K * K);
        for (size_t a = 0; a < K; ++a)
            for (size_t b = 0; b <= a; ++b)
                m[a * K + b] = m[b * K + a] =
                    a == b ? static_cast<float>(K + rng.uniform()) : static_cast<float>(0.1 * (2 * rng.uniform() - 1));
        out.insert(out.end(), m.begin(), m.end());
    };
    for (size_t s = 0; s < S; ++s) {
        for (size_t k = 0; k < K; ++k) p.user_mu.push_back(normal(0.2));
        add_lambda(p.user_lambda);
        for (size_t k = 0; k < K; ++k) p.item_mu.push_back(normal(0.2));
        add_lambda(p.item_lambda);
    }

    p.rated_offsets.push_back(0);
    for (uint32_t u = 0; u < spec.users; ++u) {
        for (uint32_t i = 0; i < spec.items; ++i)
            if (rng.uniform() < 0.4) p.rated_items.push_back(i);
        p.rated_offsets.push_back(p.rated_items.size());
    }

    p.fit_metadata_json = "{\"seed\": " + std::to_string(spec.seed) +
                          ", \"data_fingerprint\": \"0f1e2d3c4b5a6978\", \"options\": {\"rank\": " +
                          std::to_string(spec.rank) + "}}";
    p.diagnostics_json = R"({"verdict": "converged", "max_rhat": 1.004, "warnings": []})";
    return p;
}

}  // namespace credence::testing
