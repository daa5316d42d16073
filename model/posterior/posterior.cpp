#include "model/posterior/posterior.hpp"

#include <algorithm>
#include <cmath>
#include <ctime>
#include <stdexcept>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/error.hpp"

namespace credence {

float Posterior::sample_prediction(uint32_t s, uint32_t u, uint32_t i) const {
    const float* a = user_factors.data() + (static_cast<size_t>(s) * num_users + u) * rank;
    const float* b = item_factors.data() + (static_cast<size_t>(s) * num_items + i) * rank;
    float dot = 0.0f;
    for (uint32_t k = 0; k < rank; ++k) dot += a[k] * b[k];
    return global_mean + user_bias_of(s, u) + item_bias_of(s, i) + dot;
}

namespace {
void expect_size(const char* what, size_t actual, size_t expected) {
    if (actual != expected)
        throw FormatError(std::string("posterior: ") + what + " has " + std::to_string(actual) +
                          " values, expected " + std::to_string(expected));
}

// Every value of a section is finite; `per_sample` values belong to each
// sample, so the message can say which one.
void expect_finite(const char* section, const std::vector<float>& values, size_t per_sample) {
    const auto bad = std::find_if(values.begin(), values.end(), [](float x) { return !std::isfinite(x); });
    if (bad == values.end()) return;
    const size_t at = static_cast<size_t>(bad - values.begin());
    throw FormatError(std::string("posterior: section ") + section + " holds " + (std::isnan(*bad) ? "NaN" : "an infinite value") +
                      " (value " + std::to_string(at) + ", sample " + std::to_string(per_sample ? at / per_sample : 0) +
                      "); every number must be finite");
}

// Precisions: finite and positive.
void expect_positive(const char* section, const std::vector<float>& values) {
    expect_finite(section, values, 1);
    for (size_t s = 0; s < values.size(); ++s)
        if (!(values[s] > 0.0f))
            throw FormatError(std::string("posterior: section ") + section + " holds " + std::to_string(values[s]) +
                              " at sample " + std::to_string(s) + "; a precision must be positive");
}

// Precision matrices [S][K][K]: finite with a positive diagonal.
void expect_precision_matrices(const char* section, const std::vector<float>& values, size_t K) {
    expect_finite(section, values, K * K);
    for (size_t s = 0; s < values.size() / (K * K); ++s)
        for (size_t k = 0; k < K; ++k)
            if (!(values[(s * K + k) * K + k] > 0.0f))
                throw FormatError(std::string("posterior: section ") + section + " of sample " + std::to_string(s) +
                                  " has a diagonal entry that is not positive; it is not a precision matrix");
}
}  // namespace

void Posterior::validate() const {
    if (rank == 0) throw FormatError("posterior: rank is 0");
    if (num_samples == 0) throw FormatError("posterior: no kept samples");
    if (num_chains == 0) throw FormatError("posterior: no chains");
    const size_t S = num_samples, U = num_users, I = num_items, K = rank;
    expect_size("user_ids", user_ids.size(), U);
    expect_size("item_ids", item_ids.size(), I);
    expect_size("item_names", item_names.size(), has_catalogue() ? I : 0);
    expect_size("item_categories", item_categories.size(), has_catalogue() ? I : 0);
    expect_size("sample_chain", sample_chain.size(), S);
    for (size_t s = 0; s < S; ++s) {
        if (sample_chain[s] >= num_chains)
            throw FormatError("posterior: sample " + std::to_string(s) + " names chain " +
                              std::to_string(sample_chain[s]) + " of " + std::to_string(num_chains));
        if (s > 0 && sample_chain[s] < sample_chain[s - 1])
            throw FormatError("posterior: samples of one chain are not contiguous");
    }
    expect_size("user_factors", user_factors.size(), S * U * K);
    expect_size("item_factors", item_factors.size(), S * I * K);
    expect_size("user_bias", user_bias.size(), has_biases ? S * U : 0);
    expect_size("item_bias", item_bias.size(), has_biases ? S * I : 0);
    expect_size("user_bias_precision", user_bias_precision.size(), has_biases ? S : 0);
    expect_size("item_bias_precision", item_bias_precision.size(), has_biases ? S : 0);
    expect_size("noise_precision", noise_precision.size(), S);
    expect_size("user_mu", user_mu.size(), S * K);
    expect_size("item_mu", item_mu.size(), S * K);
    expect_size("user_lambda", user_lambda.size(), S * K * K);
    expect_size("item_lambda", item_lambda.size(), S * K * K);
    for (size_t s = 0; s < S; ++s)
        if (!(noise_precision[s] > 0.0f) || !std::isfinite(noise_precision[s]))
            throw FormatError("posterior: noise precision of sample " + std::to_string(s) +
                              " is not a positive finite number");
    // Every stored number is finite and every precision positive: a file
    // with valid checksums may still carry NaN from a broken writer.
    expect_finite("user_factors", user_factors, U * K);
    expect_finite("item_factors", item_factors, I * K);
    expect_finite("user_bias", user_bias, U);
    expect_finite("item_bias", item_bias, I);
    expect_finite("user_mu", user_mu, K);
    expect_finite("item_mu", item_mu, K);
    expect_precision_matrices("user_lambda", user_lambda, K);
    expect_precision_matrices("item_lambda", item_lambda, K);
    expect_positive("user_bias_precision", user_bias_precision);
    expect_positive("item_bias_precision", item_bias_precision);
    if (!(scale.min <= scale.max) || !std::isfinite(scale.min) || !std::isfinite(scale.max))
        throw FormatError("posterior: rating scale is not a finite interval");
    if (!std::isfinite(global_mean)) throw FormatError("posterior: global mean is not finite");
    expect_size("rated_offsets", rated_offsets.size(), U + 1);
    if (rated_offsets.front() != 0 || rated_offsets.back() != rated_items.size())
        throw FormatError("posterior: rated-items offsets do not span the item list");
    // All offsets first, so the row walk below never reads past the list.
    for (size_t u = 0; u < U; ++u)
        if (rated_offsets[u] > rated_offsets[u + 1])
            throw FormatError("posterior: rated-items offsets decrease at user " + std::to_string(u));
    for (size_t u = 0; u < U; ++u) {
        for (uint64_t p = rated_offsets[u]; p < rated_offsets[u + 1]; ++p) {
            if (rated_items[p] >= I)
                throw FormatError("posterior: user " + std::to_string(u) + " rated item index " +
                                  std::to_string(rated_items[p]) + " beyond " + std::to_string(I));
            if (p > rated_offsets[u] && rated_items[p] <= rated_items[p - 1])
                throw FormatError("posterior: rated items of user " + std::to_string(u) +
                                  " are not sorted and unique");
        }
    }
}

namespace {

// Copies [S][U][width] minus user `u`'s rows.
std::vector<float> without_rows(const std::vector<float>& values, size_t samples, size_t users, size_t width, size_t u) {
    if (values.empty()) return {};
    std::vector<float> out;
    out.reserve(samples * (users - 1) * width);
    for (size_t s = 0; s < samples; ++s) {
        const auto* block = values.data() + s * users * width;
        out.insert(out.end(), block, block + u * width);
        out.insert(out.end(), block + (u + 1) * width, block + users * width);
    }
    return out;
}

// The convergence figures without probe pairs of `id`, and without `id` in warnings.
std::string diagnostics_without(const std::string& text, const std::string& id) {
    nlohmann::json doc = nlohmann::json::parse(text, nullptr, false);
    if (doc.is_discarded() || !doc.is_object()) return text;
    if (auto it = doc.find("quantities"); it != doc.end() && it->is_array()) {
        nlohmann::json kept = nlohmann::json::array();
        for (const auto& q : *it)
            if (!(q.is_object() && q.contains("user_id") && q["user_id"] == id)) kept.push_back(q);
        *it = std::move(kept);
    }
    if (auto it = doc.find("warnings"); it != doc.end() && it->is_array() && !id.empty()) {
        for (auto& w : *it) {
            if (!w.is_string()) continue;
            std::string line = w.get<std::string>();
            for (size_t at = line.find(id); at != std::string::npos; at = line.find(id, at + 1))
                line.replace(at, id.size(), "(a removed customer)");
            w = line;
        }
    }
    return doc.dump();
}

}  // namespace

Posterior without_user(const Posterior& p, uint32_t user) {
    if (user >= p.num_users)
        throw std::out_of_range("without_user: user index " + std::to_string(user) + " is beyond the model's " +
                                std::to_string(p.num_users) + " users");
    const size_t S = p.num_samples, U = p.num_users, K = p.rank, u = user;
    Posterior out = p;  // items, hyperparameters, metadata: unchanged
    out.num_users = p.num_users - 1;
    out.user_ids.erase(out.user_ids.begin() + static_cast<std::ptrdiff_t>(u));
    out.user_factors = without_rows(p.user_factors, S, U, K, u);
    out.user_bias = without_rows(p.user_bias, S, U, 1, u);
    out.rated_offsets.clear();
    out.rated_items.clear();
    out.rated_offsets.push_back(0);
    for (size_t v = 0; v < U; ++v) {
        if (v == u) continue;
        const auto rated = p.rated_by(static_cast<uint32_t>(v));
        out.rated_items.insert(out.rated_items.end(), rated.begin(), rated.end());
        out.rated_offsets.push_back(out.rated_items.size());
    }
    out.diagnostics_json = diagnostics_without(p.diagnostics_json, p.user_ids[u]);
    return out;
}

std::string utc_now_iso8601() {
    const std::time_t now = std::time(nullptr);
    std::tm tm{};
    gmtime_r(&now, &tm);
    char buf[32];
    std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
    return buf;
}

}  // namespace credence
