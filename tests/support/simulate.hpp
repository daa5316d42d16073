// Synthetic data for tests and benchmarks: ratings drawn from the model
// itself (recovery tests), a seeded train/holdout split, and a random but
// valid fitted Posterior built without running the sampler (file format,
// prediction, evaluation, server tests and the serving benchmark). Ids are
// invented shop ids ("customer-000017", "product-000042", "cust-0007").
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include "model/data/holdout.hpp"  // split_holdout, used with simulated data
#include "model/posterior/posterior.hpp"
#include "model/data/ratings.hpp"

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

// How simulate_posterior names users and items.
enum class SimulatedIdStyle {
    numbered,  // "<user_prefix>-0007", "<item_prefix>-0042", zero-padded to id_digits
    goods,     // "customer-1000", "teapot-0", ...; every sixth item id is
               // non-ASCII UTF-8 ("\xc3\xb6ko-mug-5") to exercise id handling
};

struct SimulatedPosteriorOptions {
    // ---- shape; samples are split over the chains as evenly as possible
    uint32_t users = 20;
    uint32_t items = 50;
    uint32_t rank = 4;
    uint32_t samples = 30;
    uint32_t chains = 1;
    bool biases = true;
    uint64_t seed = 1;  // same options -> bit-identical posterior

    // ---- values. Each factor (and bias) row has a centre ~ Normal(0, sd^2)
    // and each sample adds its own Normal(0, jitter_sd^2), so samples disagree
    // the way real posterior draws do. Hyperparameters are random too: mu ~
    // Normal(0, 0.1^2), Lambda symmetric and diagonally dominant (so positive
    // definite), bias precisions in [8, 9).
    bool zero_values = false;      // instead: zero factors, biases and mu, tau = 1,
                                   // identity Lambda, bias precisions 1, nothing rated;
                                   // for tests that then write chosen numbers in
    double factor_sd = 0.6;
    double jitter_sd = 0.25;
    double bias_sd = 0.3;
    double noise_precision = 2.0;  // mean of tau; each sample's tau is within +-20%
    double rated_fraction = 0.2;   // chance that a user rated a given item, in [0, 1]
    uint32_t duplicate_items = 0;  // the last d items copy items 0..d-1 exactly (score
                                   // ties); must be <= items / 2
    float global_mean = 3.5f;
    RatingScale scale{1.0f, 5.0f, true};

    // ---- identity and documents
    SimulatedIdStyle id_style = SimulatedIdStyle::numbered;
    std::string user_prefix = "cust";
    std::string item_prefix = "sku";
    uint32_t id_digits = 4;
    // Empty: {"generator":"synthetic","seed":<seed>} and {"verdict":"not assessed"}.
    std::string fit_metadata_json{};
    std::string diagnostics_json{};
};

// Returns a posterior that passes Posterior::validate(). Throws
// std::invalid_argument for samples == 0, chains == 0 or > samples,
// rank == 0, rated_fraction outside [0, 1], negative sds, or
// duplicate_items > items / 2.
Posterior simulate_posterior(const SimulatedPosteriorOptions& options);


}  // namespace credence
