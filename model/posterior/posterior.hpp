// The fitted model in memory: every kept Gibbs sample of the factors, biases,
// noise precision and hyperparameters, plus what serving needs (id maps,
// rating scale, each user's rated items). It is what the sampler returns, what
// the posterior file stores (model/posterior/FORMAT.md) and what the prediction engine,
// evaluation, diagnostics and the server read. Immutable once built; share it
// as std::shared_ptr<const Posterior>.
//
// Layout: all per-sample arrays are sample-major and float32, so one sample's
// item factors are one contiguous [num_items x rank] row-major block, which
// is what scoring all items for one user streams through.
#pragma once
#include <cstdint>
#include <span>
#include <string>
#include <vector>

#include "model/data/ratings.hpp"

namespace credence {

struct Posterior {
    // ---- shape
    uint32_t rank = 0;         // K, factor dimension
    uint32_t num_users = 0;    // U
    uint32_t num_items = 0;    // I
    uint32_t num_samples = 0;  // S, kept samples over all chains
    uint32_t num_chains = 0;
    bool has_biases = false;

    // ---- identity and scale
    std::vector<std::string> user_ids;  // [U], dense index -> external id
    std::vector<std::string> item_ids;  // [I]
    float global_mean = 0.0f;           // mean training rating, fixed offset
    RatingScale scale;

    // ---- kept samples (S of each); sample s came from chain sample_chain[s]
    std::vector<uint32_t> sample_chain;     // [S], samples of one chain are contiguous and in sweep order
    std::vector<float> user_factors;        // [S][U][K]
    std::vector<float> item_factors;        // [S][I][K]
    std::vector<float> user_bias;           // [S][U], empty unless has_biases
    std::vector<float> item_bias;           // [S][I], empty unless has_biases
    std::vector<float> noise_precision;     // [S], tau: rating noise variance is 1/tau

    // ---- hyperparameters of each kept sample (Normal-Wishart draws)
    std::vector<float> user_mu;             // [S][K]
    std::vector<float> user_lambda;         // [S][K][K], precision matrix, row-major
    std::vector<float> item_mu;             // [S][K]
    std::vector<float> item_lambda;         // [S][K][K]
    std::vector<float> user_bias_precision; // [S], empty unless has_biases
    std::vector<float> item_bias_precision; // [S], empty unless has_biases

    // ---- each user's rated items, CSR; items sorted ascending (top-N excludes them)
    std::vector<uint64_t> rated_offsets;    // [U+1]
    std::vector<uint32_t> rated_items;      // [rated_offsets[U]]

    // ---- the shop's catalogue (fit --catalogue): both empty when the fit had
    // none, else both [I]; "" where the catalogue has no name or category
    // for that product. Format version 2 sections item_names, item_categories.
    std::vector<std::string> item_names;       // [I] or empty
    std::vector<std::string> item_categories;  // [I] or empty

    // ---- free-form JSON documents carried in the file
    std::string fit_metadata_json = "{}";   // arguments, seed, data fingerprint, timings, per-sweep trace
    std::string diagnostics_json = "{}";    // R-hat / ESS figures and verdict (see model/math/convergence_diagnostics.hpp)

    // ---- accessors (no bounds checks; callers validate indices)
    std::span<const float> user_factor(uint32_t s, uint32_t u) const {
        return {user_factors.data() + (static_cast<size_t>(s) * num_users + u) * rank, rank};
    }
    std::span<const float> item_factor(uint32_t s, uint32_t i) const {
        return {item_factors.data() + (static_cast<size_t>(s) * num_items + i) * rank, rank};
    }
    // All item factors of sample s: [I][K] contiguous.
    const float* item_block(uint32_t s) const {
        return item_factors.data() + static_cast<size_t>(s) * num_items * rank;
    }
    float user_bias_of(uint32_t s, uint32_t u) const {
        return has_biases ? user_bias[static_cast<size_t>(s) * num_users + u] : 0.0f;
    }
    float item_bias_of(uint32_t s, uint32_t i) const {
        return has_biases ? item_bias[static_cast<size_t>(s) * num_items + i] : 0.0f;
    }
    std::span<const uint32_t> rated_by(uint32_t u) const {
        return {rated_items.data() + rated_offsets[u], rated_items.data() + rated_offsets[u + 1]};
    }
    bool has_catalogue() const { return !item_names.empty(); }
    // The catalogue name of item i, "" when there is none.
    const std::string& item_name(uint32_t i) const {
        static const std::string none;
        return has_catalogue() ? item_names[i] : none;
    }
    const std::string& item_category(uint32_t i) const {
        static const std::string none;
        return has_catalogue() ? item_categories[i] : none;
    }
    // Mean of the rating under sample s (no noise): global mean + biases + u.v
    float sample_prediction(uint32_t s, uint32_t u, uint32_t i) const;

    // Checks every size and invariant above, and that every stored number is
    // finite (precisions positive, precision matrices with a positive
    // diagonal); throws FormatError naming the first one that fails and its
    // section. Called by the file reader and by tests.
    void validate() const;
};

// A copy of `p` without one user: their id, factors, bias and rated list
// are gone, so nothing personal to them remains, and users after them move
// down one index. Everything else is copied unchanged: the item factors,
// biases and hyperparameters still carry that user's influence on the fit
// until the model is refitted without their ratings. Probe pairs of that
// user leave the convergence figures (diagnostics_json) and their id leaves
// its warnings. Throws std::out_of_range for an index beyond the model (a
// caller maps ids first, so that is a bug).
Posterior without_user(const Posterior& p, uint32_t user);

// The current time as written into fit metadata's created_at and the
// report's date: UTC, ISO 8601 to the second ("2026-12-04T02:10:40Z").
// Never throws.
std::string utc_now_iso8601();

}  // namespace credence
