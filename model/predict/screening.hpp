// Per-sample means m_s = g + b_u,s + c_i,s + <U_u,s, V_i,s> for the prediction
// engine, in two precisions. Internal to model/.
//   - Reference (double): what predict() and every exact score use.
//   - Screening (float dot products, double sums): per-item summaries over
//     all samples (sum, sum of squares, min and max of m_s + shift_s), each
//     m_s within a proven slack of the reference value, so pruning on the
//     summaries never changes a result. One pass over the item samples can
//     serve several viewers at once: each item block is read from memory once
//     and scored for every viewer while it is in cache. A mean-only pass of
//     one to three viewers may read a half-precision copy of the item
//     factors instead (HalfItemBlocks; half the bytes), its rounding added
//     to the slack.
#pragma once
#include <cstddef>
#include <cstdint>
#include <span>
#include <vector>

#include "model/posterior/posterior.hpp"

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

// One viewer's share of an all-samples screening pass. The caller sets
// `viewer` and, for quantile rankings, `shift` ([S], shift_s = z / sqrt(tau_s));
// the pass fills the summaries. With m_s the screened means of an item:
//   sum = sum_s m_s always; sum_sq = sum_s m_s^2, lo = min_s (m_s + shift_s)
//   and hi = max_s (m_s + shift_s) only when shift is given (else empty),
//   and then also rows[j * S + s] = m_s in float, for a closer look at the
//   few candidates near the top.
// Every |m_s - reference m_s| <= slack. Reusing one ScreenJob across
// requests keeps its buffers (no allocation per request).
struct ScreenJob {
    Viewer viewer;
    std::span<const double> shift;
    std::vector<double> sum, sum_sq, lo, hi;
    std::vector<double> magnitude;  // max_s |m_s| per item: feeds the slack
    std::vector<float> rows;        // [count][S], quantile rankings only
    double slack = 0.0;

    bool quantiles() const { return !shift.empty(); }
};

// Per item, the sum over samples of its bias c_i,s (in double, samples in
// order) and the largest sum of |c_i,s|: what a mean-only pass would
// otherwise re-read from the bias block every time. Empty sum without biases.
struct ItemBiasTotals {
    std::vector<double> sum;      // [I]
    double largest_abs_sum = 0.0;  // max_i sum_s |c_i,s|
};
ItemBiasTotals item_bias_totals(const Posterior& p);

// The item factors rounded to IEEE half precision (model/math/half_float.hpp),
// laid out as the item blocks ([S][I][K]): half the bytes for a mean-only
// pass to read. With it, each sample's largest rounding residual
// max_i |V_i,s - half(V_i,s)| (Euclidean, in double), which the slack of
// such a pass adds (so pruning still never changes a result).
struct HalfItemBlocks {
    std::vector<uint16_t> values;       // [S * I * K]; empty when not usable
    std::vector<double> residual_norm;  // [S]
    bool usable() const { return !values.empty(); }
};

// The half copy of p's item factors. Returns an unusable (empty) copy when
// some factor is beyond half's range (|v| > 65504) or p has no items; never
// throws but std::bad_alloc. Costs S * I * K * 2 bytes.
HalfItemBlocks half_item_blocks(const Posterior& p);

// Screens every item of the model (summary index = item index) for every
// job in one pass over the item samples. Needs shift.size() == S where given.
// `threads` > 1 splits the catalogue's tiles between that many OpenMP
// threads (more memory bandwidth for one pass); the summaries are the same
// bits for any value. `bias_totals`, when given, must be
// item_bias_totals(p) (std::invalid_argument when its size is not I): then
// a pass with only mean-ranking jobs does not read the bias block (the
// summaries are the same bits either way). `half`, when given and usable,
// must be half_item_blocks(p) (std::invalid_argument when its size differs):
// then a pass with only mean-ranking jobs reads the half copy instead of the
// float factors, and its slack grows by the copy's residuals (the summaries
// differ in the last bits, the answers built on them do not).
void screen_all_items(const Posterior& p, std::span<const double> max_item_norm, std::span<ScreenJob* const> jobs,
                      int threads = 1, const ItemBiasTotals* bias_totals = nullptr,
                      const HalfItemBlocks* half = nullptr);

// Screens only the `pool` items (summary index = position in pool) for one
// job: cheaper than a full pass when the pool is a small part of the catalogue.
void screen_pool(const Posterior& p, std::span<const double> max_item_norm, const std::vector<uint32_t>& pool,
                 ScreenJob& job);

// Screened m_s of every pool item under sample s; returns the slack.
double screen_one_sample(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                         const std::vector<uint32_t>& pool, uint32_t s, std::vector<double>& out);

}  // namespace credence
