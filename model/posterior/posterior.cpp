#include "model/posterior/posterior.hpp"

#include <algorithm>
#include <cmath>
#include <string>
#include <vector>

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

}  // namespace credence
