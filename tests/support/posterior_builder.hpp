// Builds valid credence::Posterior values in memory for tests: either blank
// (right sizes, zero factors, unit noise precision, for tests that fill in
// chosen values) or random with a fixed seed (a per-row centre plus
// per-sample jitter, so samples disagree the way real posterior draws do).
// Ids follow the invented shop: customers "cust-0007", products "sku-0042".
#pragma once
#include <algorithm>
#include <cstdint>
#include <cstdio>
#include <memory>
#include <string>
#include <vector>

#include "model/posterior.hpp"
#include "model/random.hpp"

namespace credence::testing {

struct PosteriorShape {
    uint32_t users = 20;
    uint32_t items = 50;
    uint32_t rank = 4;
    uint32_t samples = 30;
    uint32_t chains = 1;
    bool biases = true;
};

struct RandomPosteriorOptions {
    double factor_sd = 0.6;       // sd of each row's centre factor
    double jitter_sd = 0.25;      // sd of a sample's deviation from the centre
    double bias_sd = 0.3;
    double noise_precision = 2.0; // mean of tau; samples vary by +-20%
    double rated_fraction = 0.2;  // chance that a user rated a given item
    uint32_t duplicate_items = 0; // the last d items copy items 0..d-1 exactly (score ties)
    float global_mean = 3.5f;
    RatingScale scale{1.0f, 5.0f, true};
};

inline std::string shop_id(const char* prefix, uint32_t index) {
    char buf[32];
    std::snprintf(buf, sizeof buf, "%s-%04u", prefix, index);
    return buf;
}

// Right sizes, zero factors and biases, tau = 1, identity hyperparameters, no
// rated items. Samples are split evenly over the chains.
inline Posterior blank_posterior(const PosteriorShape& shape) {
    Posterior p;
    p.rank = shape.rank;
    p.num_users = shape.users;
    p.num_items = shape.items;
    p.num_samples = shape.samples;
    p.num_chains = shape.chains;
    p.has_biases = shape.biases;
    for (uint32_t u = 0; u < shape.users; ++u) p.user_ids.push_back(shop_id("cust", u));
    for (uint32_t i = 0; i < shape.items; ++i) p.item_ids.push_back(shop_id("sku", i));
    p.global_mean = 3.0f;
    p.scale = RatingScale{1.0f, 5.0f, true};
    const size_t S = shape.samples, U = shape.users, I = shape.items, K = shape.rank;
    for (uint32_t s = 0; s < shape.samples; ++s)
        p.sample_chain.push_back(static_cast<uint32_t>(static_cast<uint64_t>(s) * shape.chains / shape.samples));
    p.user_factors.assign(S * U * K, 0.0f);
    p.item_factors.assign(S * I * K, 0.0f);
    if (shape.biases) {
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
    return p;
}

// A random but valid posterior; the same seed gives the same posterior.
inline std::shared_ptr<const Posterior> random_posterior(const PosteriorShape& shape, uint64_t seed,
                                                         const RandomPosteriorOptions& opt = {}) {
    Posterior p = blank_posterior(shape);
    p.global_mean = opt.global_mean;
    p.scale = opt.scale;
    Rng rng(seed);
    const size_t S = shape.samples, U = shape.users, I = shape.items, K = shape.rank;
    auto fill = [&](std::vector<float>& dst, size_t rows, size_t width, double centre_sd) {
        std::vector<double> centre(rows * width);
        for (auto& c : centre) c = centre_sd * rng.normal();
        for (size_t s = 0; s < S; ++s)
            for (size_t r = 0; r < rows * width; ++r)
                dst[s * rows * width + r] = static_cast<float>(centre[r] + opt.jitter_sd * rng.normal());
    };
    fill(p.user_factors, U, K, opt.factor_sd);
    fill(p.item_factors, I, K, opt.factor_sd);
    if (shape.biases) {
        fill(p.user_bias, U, 1, opt.bias_sd);
        fill(p.item_bias, I, 1, opt.bias_sd);
    }
    for (size_t s = 0; s < S; ++s)
        p.noise_precision[s] = static_cast<float>(opt.noise_precision * (0.8 + 0.4 * rng.uniform()));
    const uint32_t d = std::min(opt.duplicate_items, shape.items / 2);
    for (size_t s = 0; s < S; ++s)
        for (uint32_t j = 0; j < d; ++j) {
            const size_t to = I - d + j;
            std::copy_n(p.item_factors.begin() + static_cast<std::ptrdiff_t>((s * I + j) * K), K,
                        p.item_factors.begin() + static_cast<std::ptrdiff_t>((s * I + to) * K));
            if (shape.biases) p.item_bias[s * I + to] = p.item_bias[s * I + j];
        }
    p.rated_items.clear();
    for (uint32_t u = 0; u < shape.users; ++u) {
        for (uint32_t i = 0; i < shape.items; ++i)
            if (rng.uniform() < opt.rated_fraction) p.rated_items.push_back(i);
        p.rated_offsets[u + 1] = p.rated_items.size();
    }
    p.validate();
    return std::make_shared<const Posterior>(std::move(p));
}

}  // namespace credence::testing
