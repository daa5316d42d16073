// Per-sample means m_s = g + b_u,s + c_i,s + <U_u,s, V_i,s> for the prediction
// engine, in two precisions. Internal to model/.
//   - Reference (double): what predict() and every exact score use.
//   - Screening (float, Eigen matrix-vector products over item blocks): for
//     all candidate items at once, with a proven bound on its distance from
//     the reference, so pruning on screened values never changes a result.
#pragma once
#include <cstddef>
#include <cstdint>
#include <span>
#include <vector>

#include "model/posterior.hpp"

namespace credence {

// Whoever receives predictions: a known user or a folded-in visitor.
struct Viewer {
    const float* factors = nullptr;  // sample s's factor at factors + s * factor_stride
    size_t factor_stride = 0;
    const float* bias = nullptr;     // sample s's bias at bias[s * bias_stride]; null means 0
    size_t bias_stride = 0;

    const float* factor(uint32_t s) const { return factors + static_cast<size_t>(s) * factor_stride; }
    double bias_of(uint32_t s) const { return bias ? static_cast<double>(bias[s * bias_stride]) : 0.0; }
};

Viewer known_user(const Posterior& p, uint32_t user);

// Reference m_s for every sample (out is resized to S), and for one sample.
void reference_means(const Posterior& p, const Viewer& v, uint32_t item, std::vector<double>& out);
double reference_mean(const Posterior& p, const Viewer& v, uint32_t s, uint32_t item);

// [S] largest item-factor norm per sample; feeds the rounding bound.
std::vector<double> max_item_norms(const Posterior& p);

struct ScreenedMeans {
    uint32_t samples = 0;
    std::vector<float> values;  // [pool][S], item-major so one item's samples are contiguous
    double slack = 0.0;         // every |value - reference| <= slack
    std::span<const float> row(size_t j) const { return {values.data() + j * samples, samples}; }
};

// Screened m_s of every pool item (pool ascending) under every sample.
ScreenedMeans screen_all_samples(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                                 const std::vector<uint32_t>& pool);

// Screened m_s of every pool item under sample s; returns the slack.
double screen_one_sample(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                         const std::vector<uint32_t>& pool, uint32_t s, std::vector<double>& out);

}  // namespace credence
