// The prediction engine: posterior predictive answers for one model, shared
// by the offline commands (predict, recommend, evaluate) and the HTTP server.
//
// The predictive distribution of a rating is the equal-weight mixture over
// kept samples s of Normal(m_s, 1/tau_s), where m_s is sample s's
// prediction. Its mean and sd are exact mixture moments; interval bounds are
// exact mixture quantiles (found by bracketing and bisection on the mixture
// CDF), then clipped to the rating scale. Thread-safe: all methods are const.
#pragma once
#include <cstdint>
#include <exception>
#include <memory>
#include <optional>
#include <span>
#include <vector>

#include "model/posterior/posterior.hpp"
#include "model/predict/mixture.hpp"

namespace credence {

struct ItemBiasTotals;  // model/predict/screening.hpp
struct HalfItemBlocks;  // model/predict/screening.hpp

struct Prediction {
    double mean = 0.0;   // mixture mean, clipped to the scale
    double sd = 0.0;     // mixture sd (unclipped predictive spread)
    double lower = 0.0;  // (1-level)/2 quantile, clipped to the scale
    double upper = 0.0;  // (1+level)/2 quantile, clipped to the scale
    // Exact (bitwise for finite values) equality: batched and unbatched
    // answers must agree to the last bit.
    bool operator==(const Prediction&) const = default;
};

enum class RankBy {
    mean,   // posterior predictive mean
    lower,  // lower interval bound: cautious
    upper,  // upper interval bound: optimistic
    draw,   // one posterior sample's prediction: exploration by posterior sampling
};

struct RecommendOptions {
    uint32_t n = 10;
    RankBy rank_by = RankBy::mean;
    double level = 0.9;
    bool exclude_rated = true;
    std::optional<std::vector<uint32_t>> candidates;  // restrict to these items (deduplicated by the engine)
    uint64_t draw_seed = 0;                           // for RankBy::draw: which posterior sample
};

// A list is ordered by score, highest first, ties by lower item index.
// Because clipping is monotone, that is the same order as by rank_value with
// ties in rank_value (several items at a scale end) broken by score: so a
// reader of rank_value and score can always see why the order is what it is.
struct Recommendation {
    uint32_t item = 0;
    double score = 0.0;       // the value ranked by (mean, bound or draw), before clipping to the scale
    double rank_value = 0.0;  // score clipped to the rating scale. For a known user ranked by mean,
                              // lower or upper it is prediction.mean, .lower, .upper bit for bit; for
                              // a visitor (foldin.hpp) the same up to rounding
    Prediction prediction;
    bool operator==(const Recommendation&) const = default;
};

// One known user's request in a batch, and its answer: the items, or the
// exception recommend() would have thrown for it.
struct RecommendRequest {
    uint32_t user = 0;
    RecommendOptions options;
};

struct RecommendAnswer {
    std::vector<Recommendation> items;
    std::exception_ptr error;  // null on success
};

// The candidate items of one request, ascending and unique: the request's
// candidates (or every item) minus `exclude` when options.exclude_rated.
// Used by the engine and by the visitor fold-in. Throws OptionError for
// n == 0 or a level outside (0, 1); std::invalid_argument for a candidate or
// excluded index beyond the model (callers map ids first: a bug).
std::vector<uint32_t> request_candidates(const Posterior& posterior, std::span<const uint32_t> exclude,
                                         const RecommendOptions& options);

// The kept sample a RankBy::draw request ranks by: uniform over the S > 0
// samples, keyed by the draw seed (Rng::keyed(seed, 0, 0, StreamBlock::serve, 0)).
uint32_t drawn_sample(uint64_t draw_seed, uint32_t samples);

// Checks an interval level: strictly between 0 and 1, with (1 - level)/2 and
// (1 + level)/2 strictly inside (0, 1) in double precision (so a level within
// about 1e-16 of 1 is refused). Throws OptionError quoting the level.
void check_interval_level(double level);

// How a PredictionEngine prepares its top-N screening.
struct EngineOptions {
    // Keep a half-precision copy of the item factors (S * I * K * 2 bytes more,
    // built when the engine is made) that mean-ranking passes of one to three
    // requests read instead of the floats, at about half the memory traffic,
    // where the CPU widens halves (F16C). Answers are the same bits either way.
    // On in the server; off for one-off engines (evaluate, compare, the CLI).
    bool half_precision_screening = false;
};

class PredictionEngine {
public:
    // Needs a non-null posterior that passes Posterior::validate(); throws
    // std::invalid_argument for a null one.
    explicit PredictionEngine(std::shared_ptr<const Posterior> posterior, EngineOptions options = {});

    const Posterior& posterior() const { return *posterior_; }

    // Per-sample means m_s for a known (user, item) pair; size S. Needs valid
    // indices (unchecked).
    void sample_means(uint32_t user, uint32_t item, std::vector<double>& out) const;

    // Throws OptionError for a level outside (0, 1); std::out_of_range for a
    // user or item index beyond the model (callers map ids first, so that is
    // a bug).
    Prediction predict(uint32_t user, uint32_t item, double level) const;

    // Top-n items for a known user. Ties break by item index. Throws
    // OptionError for a level outside (0, 1) or n == 0; std::out_of_range for
    // a user index beyond the model and std::invalid_argument for a candidate
    // index beyond it (callers map ids first: both are bugs).
    std::vector<Recommendation> recommend(uint32_t user, const RecommendOptions& options) const;

    // Several requests at once: answer k equals recommend(requests[k].user,
    // requests[k].options), or holds what it would have thrown. Requests that
    // rank by mean, lower or upper over most of the catalogue share one pass
    // over the item samples, which reads the model from memory once for all
    // of them; `threads` > 1 splits that pass, and then the requests'
    // selections, between OpenMP threads (the answers are the same bits for
    // any value). Never throws for a bad
    // request; std::bad_alloc may escape.
    std::vector<RecommendAnswer> recommend_batch(std::span<const RecommendRequest> requests, int threads = 1) const;

    // Top-n for a visitor described by per-sample factors and biases (fold-in):
    // visitor_factors is [S][K], visitor_bias is [S] (zeros without biases),
    // `exclude` lists item indices the visitor has rated (sorted). Throws like
    // recommend(), and std::invalid_argument when the spans' sizes do not
    // match the model or an excluded index is beyond it (bugs in the caller).
    std::vector<Recommendation> recommend_for_factors(std::span<const float> visitor_factors,
                                                      std::span<const float> visitor_bias,
                                                      std::span<const uint32_t> exclude,
                                                      const RecommendOptions& options) const;

private:
    std::shared_ptr<const Posterior> posterior_;
    // [S] largest item-factor norm of each sample: bounds the float rounding
    // of the all-items scoring pass so pruning stays exact.
    std::vector<double> max_item_norm_;
    // Per-item bias sums over the samples (model/predict/screening.hpp), so a
    // mean-ranking pass does not re-read the bias block.
    std::shared_ptr<const ItemBiasTotals> bias_totals_;
    // The item factors in half precision (model/predict/screening.hpp): what
    // a mean-ranking pass reads, half the bytes; unusable (empty) when
    // EngineOptions::half_precision_screening is off or a factor is beyond
    // half's range. S * I * K * 2 bytes when usable.
    std::shared_ptr<const HalfItemBlocks> half_blocks_;
};

}  // namespace credence
