// Synthetic ratings drawn from the model itself, for recovery tests and
// benchmarks, and a seeded train/holdout split. Ids are invented shop ids
// ("customer-000017", "product-000042").
#pragma once
#include <cstdint>
#include <vector>

#include "model/holdout.hpp"  // split_holdout, used with simulated data
#include "model/ratings.hpp"

namespace credence {

struct SimulationOptions {
    uint32_t users = 100;
    uint32_t items = 100;
    uint32_t rank = 5;
    // Which pairs are rated: each user rates `ratings_per_user` distinct items
    // chosen uniformly when > 0 (capped by no one: must be <= items), else each
    // pair independently with probability `density` in (0, 1].
    uint32_t ratings_per_user = 0;
    double density = 0.1;
    double noise_sd = 0.5;      // r = mean + noise, noise ~ Normal(0, noise_sd^2)
    double factor_sd = 1.0;     // true factors ~ Normal(0, factor_sd^2 / sqrt(rank)) per entry
                                // (so u.v has sd about factor_sd^2 whatever the rank)
    double bias_sd = 0.0;       // true biases ~ Normal(0, bias_sd^2); 0: no biases
    double global_mean = 3.0;
    uint64_t seed = 1;
};

struct SimulatedData {
    RatingSet ratings;                // sorted by (user, item), unique; scale = observed range
    std::vector<float> user_factors;  // [U][K] true values
    std::vector<float> item_factors;  // [I][K]
    std::vector<float> user_bias;     // [U] (zeros when bias_sd == 0)
    std::vector<float> item_bias;     // [I]
    double global_mean = 0.0;
    // Noise-free mean of a pair under the true parameters.
    double true_mean(uint32_t u, uint32_t i) const;
};

// Throws std::invalid_argument for zero sizes, density outside (0, 1],
// ratings_per_user > items, negative sds, or an empty result.
SimulatedData simulate_ratings(const SimulationOptions& options);


}  // namespace credence
