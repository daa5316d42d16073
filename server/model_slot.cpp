#include "server/model_slot.hpp"

#include <cstdio>

#include <xxhash.h>

#include "model/posterior/posterior_file.hpp"

namespace credence::server {

namespace {

template <typename T>
void hash_vector(XXH3_state_t* state, const std::vector<T>& v) {
    const uint64_t n = v.size();
    XXH3_64bits_update(state, &n, sizeof n);
    if (!v.empty()) XXH3_64bits_update(state, v.data(), v.size() * sizeof(T));
}

void hash_string(XXH3_state_t* state, const std::string& s) {
    const uint64_t n = s.size();
    XXH3_64bits_update(state, &n, sizeof n);
    XXH3_64bits_update(state, s.data(), s.size());
}

}  // namespace

std::string posterior_fingerprint(const Posterior& p) {
    XXH3_state_t* state = XXH3_createState();
    XXH3_64bits_reset(state);
    const uint32_t shape[6] = {p.rank, p.num_users, p.num_items, p.num_samples, p.num_chains, p.has_biases ? 1u : 0u};
    XXH3_64bits_update(state, shape, sizeof shape);
    for (const auto& id : p.user_ids) hash_string(state, id);
    for (const auto& id : p.item_ids) hash_string(state, id);
    const float scalars[3] = {p.global_mean, p.scale.min, p.scale.max};
    XXH3_64bits_update(state, scalars, sizeof scalars);
    hash_vector(state, p.sample_chain);
    hash_vector(state, p.user_factors);
    hash_vector(state, p.item_factors);
    hash_vector(state, p.user_bias);
    hash_vector(state, p.item_bias);
    hash_vector(state, p.noise_precision);
    hash_vector(state, p.user_mu);
    hash_vector(state, p.user_lambda);
    hash_vector(state, p.item_mu);
    hash_vector(state, p.item_lambda);
    hash_vector(state, p.user_bias_precision);
    hash_vector(state, p.item_bias_precision);
    hash_vector(state, p.rated_offsets);
    hash_vector(state, p.rated_items);
    hash_string(state, p.fit_metadata_json);
    hash_string(state, p.diagnostics_json);
    const uint64_t h = XXH3_64bits_digest(state);
    XXH3_freeState(state);
    char hex[17];
    std::snprintf(hex, sizeof hex, "%016llx", static_cast<unsigned long long>(h));
    return hex;
}

std::shared_ptr<const LoadedModel> build_loaded_model(std::shared_ptr<const Posterior> posterior,
                                                      std::string source_path) {
    const auto start = std::chrono::steady_clock::now();
    const Posterior& p = *posterior;
    auto m = std::make_shared<LoadedModel>(posterior);
    m->users = IdMap::from_names(p.user_ids);
    m->items = IdMap::from_names(p.item_ids);
    m->source_path = std::move(source_path);
    m->fingerprint = posterior_fingerprint(p);

    m->statistics = compute_item_statistics(p);

    m->load_ms = std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
    m->loaded_at_unix_s = std::chrono::duration_cast<std::chrono::seconds>(
                              std::chrono::system_clock::now().time_since_epoch())
                              .count();
    return m;
}

std::shared_ptr<const LoadedModel> load_model_file(const std::string& path) {
    const auto start = std::chrono::steady_clock::now();
    auto posterior = std::make_shared<const Posterior>(read_posterior(path));
    auto model = build_loaded_model(std::move(posterior), path);
    auto m = std::const_pointer_cast<LoadedModel>(model);
    m->load_ms = std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
    return model;
}

}  // namespace credence::server
