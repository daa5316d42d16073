// The prediction engine (model/predict/predict.hpp).
//
// recommend() works in two passes so that a request over every item stays
// cheap while the ranking stays exact:
//   1. Screening (model/predict/screening.hpp): per-item summaries of every
//      candidate's per-sample means, from float dot products over the item
//      blocks, each within a proven slack of the reference values. From
//      them, an interval certain to contain the candidate's exact score: the
//      mixture mean +- slack; for quantiles, the smallest and largest
//      component quantile (the mixture quantile lies between them, see
//      model/predict/mixture.cpp); for a draw, the drawn sample's mean +- slack.
//      recommend_batch() screens many users in one pass over the item
//      samples, so the model is read from memory once for all of them.
//   2. Selection (model/predict/top_n.hpp): exact scores, from the reference means
//      exactly as predict() computes them, only for candidates whose interval
//      can still reach the top n; for quantile rankings a partial mixture-CDF
//      sum over the screened means rules out most of those first.
// Screening only decides which exact scores get computed, never their value,
// so a batched answer is the same, bit for bit, as one computed alone.
// Scores are unclipped (a clipped upper bound would tie every item whose
// bound passes the scale maximum); the Prediction carried with each item is
// clipped like predict()'s.
#include "model/predict/predict.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <new>
#include <stdexcept>
#include <string>
#include <unordered_map>

#include <fmt/format.h>

#include "model/error.hpp"
#include "model/math/standard_normal.hpp"
#include "model/math/random.hpp"
#include "model/predict/screening.hpp"
#include "model/predict/top_n.hpp"

namespace credence {

// The level is a request value (a flag, a query parameter): a bad one is the
// user's to fix. Both tail probabilities must be strictly inside (0, 1) as
// doubles: a level within about 1e-16 of 1 makes (1 + level)/2 round to 1,
// whose quantile is infinite.
void check_interval_level(double level) {
    if (!(level > 0.0 && level < 1.0 && 0.5 * (1.0 + level) < 1.0 && 0.5 * (1.0 - level) > 0.0))
        throw OptionError(fmt::format("interval level must be strictly between 0 and 1 (e.g. 0.9) and "
                                      "(1 + level)/2 must be below 1 in double precision; got {:.17g}",
                                      level));
}

namespace {

void check_level(double level) { check_interval_level(level); }

double clip(const Posterior& p, double x) {
    return std::clamp(x, static_cast<double>(p.scale.min), static_cast<double>(p.scale.max));
}

Prediction prediction_from(const Posterior& p, std::span<const double> m, double level) {
    const std::span<const float> tau(p.noise_precision);
    Prediction out;
    out.mean = clip(p, mixture_mean(m));
    out.sd = mixture_sd(m, tau);
    out.lower = clip(p, mixture_quantile(m, tau, 0.5 * (1.0 - level)));
    out.upper = clip(p, mixture_quantile(m, tau, 0.5 * (1.0 + level)));
    return out;
}

// Margin for double rounding in sums and the quantile solver's tolerance
// (1e-11 relative, model/predict/mixture.cpp).
double pad(double x) { return 1e-8 * (1.0 + std::abs(x)); }

// One validated request, ready to screen and select.
struct Plan {
    Viewer viewer;
    const RecommendOptions* options = nullptr;
    std::vector<uint32_t> pool;  // ascending, unique
    bool by_quantile = false;
    double prob = 0.5;            // the quantile ranked by
    double noise_variance = 0.0;  // mean of 1/tau_s
    double z = 0.0;               // standard normal quantile of prob
    std::vector<double> shift;    // [S] z / sqrt(tau_s), when by_quantile
    bool full_pass = false;       // screen every item (summary index = item) rather than the pool
    uint32_t drawn = 0;           // for RankBy::draw: the kept sample drawn
};

// Validates the options and fills `plan` (reusing its buffers). Throws like recommend().
void make_plan(const Posterior& p, const Viewer& viewer, std::span<const uint32_t> exclude,
               const RecommendOptions& options, Plan& plan) {
    plan.viewer = viewer;
    plan.options = &options;
    plan.pool = request_candidates(p, exclude, options);
    const uint32_t S = p.num_samples;
    const std::span<const float> tau(p.noise_precision);
    plan.by_quantile = options.rank_by == RankBy::lower || options.rank_by == RankBy::upper;
    plan.prob = options.rank_by == RankBy::lower ? 0.5 * (1.0 - options.level) : 0.5 * (1.0 + options.level);
    plan.z = plan.by_quantile ? normal_quantile(plan.prob) : 0.0;
    plan.noise_variance = 0.0;
    plan.shift.clear();
    for (uint32_t s = 0; s < S; ++s) {
        if (plan.by_quantile) plan.shift.push_back(plan.z / std::sqrt(static_cast<double>(tau[s])));
        plan.noise_variance += 1.0 / static_cast<double>(tau[s]) / S;
    }
    const bool draw = options.rank_by == RankBy::draw;
    // A pool of a quarter of the catalogue or more costs about a full pass.
    plan.full_pass = !draw && plan.pool.size() * 4 >= p.num_items;
    // Thompson sampling over the mean: one kept sample, uniformly chosen.
    plan.drawn = draw ? drawn_sample(options.draw_seed, S) : 0;
}

void prepare_job(const Plan& plan, ScreenJob& job) {
    job.viewer = plan.viewer;
    job.shift = plan.by_quantile ? std::span<const double>(plan.shift) : std::span<const double>();
}

// Pass 1 for one request alone (a full pass is shared in recommend_batch).
void screen_alone(const Posterior& p, std::span<const double> max_item_norm, const ItemBiasTotals& bias_totals,
                  const HalfItemBlocks& half, const Plan& plan, ScreenJob& job) {
    if (plan.options->rank_by == RankBy::draw || plan.pool.empty()) return;
    prepare_job(plan, job);
    if (plan.full_pass) {
        ScreenJob* jobs[] = {&job};
        screen_all_items(p, max_item_norm, jobs, 1, &bias_totals, &half);
    } else {
        screen_pool(p, max_item_norm, plan.pool, job);
    }
}

// Pass 1 results: an interval for every pool item that can still reach the
// top n (from the screened summaries in `job`, or from the drawn sample when
// ranking by a draw). Needs a non-empty pool.
std::vector<ScoreBound> pass_one_bounds(const Posterior& p, std::span<const double> max_item_norm, const Plan& plan,
                                        const ScreenJob& job) {
    const std::vector<uint32_t>& pool = plan.pool;
    const RecommendOptions& options = *plan.options;
    const uint32_t S = p.num_samples;
    const Viewer& viewer = plan.viewer;
    std::vector<ScoreBound> bounds;
    if (options.rank_by == RankBy::draw) {
        std::vector<double> m;
        const double slack = screen_one_sample(p, max_item_norm, viewer, pool, plan.drawn, m);
        bounds.resize(pool.size());
        for (size_t j = 0; j < pool.size(); ++j)
            bounds[j] = {pool[j], m[j] - slack - pad(m[j]), m[j] + slack + pad(m[j]), m[j]};
    } else {
        const double slack = job.slack;
        auto lower_bound_of = [&](size_t j) {
            const size_t at = plan.full_pass ? pool[j] : j;
            const double lo = plan.by_quantile ? job.lo[at] : job.sum[at] / S;
            return lo - slack - pad(lo);
        };
        auto bound_of = [&](size_t j) -> ScoreBound {
            const size_t at = plan.full_pass ? pool[j] : j;
            const double mean = job.sum[at] / S;
            if (plan.by_quantile) {
                // Visit in the order of the normal with the mixture's moments.
                const double hi = job.hi[at];
                const double variance = std::max(0.0, job.sum_sq[at] / S - mean * mean) + plan.noise_variance;
                return {pool[j], lower_bound_of(j), hi + slack + pad(hi), mean + plan.z * std::sqrt(variance)};
            }
            return {pool[j], lower_bound_of(j), mean + slack + pad(mean), mean};
        };
        // select_top_n's first step, done here so that only the few items
        // whose upper bound reaches the n-th largest lower bound get a
        // ScoreBound (a catalogue-sized array of them cost more than the
        // rest of the selection): the same threshold on the same numbers,
        // so the same survivors, and select_top_n's own step then drops none.
        double threshold = -std::numeric_limits<double>::infinity();
        if (pool.size() > options.n) {
            thread_local std::vector<double> lows;  // reused: no fresh pages per request
            lows.resize(pool.size());
            for (size_t j = 0; j < pool.size(); ++j) lows[j] = lower_bound_of(j);
            std::nth_element(lows.begin(), lows.begin() + static_cast<std::ptrdiff_t>(options.n - 1), lows.end(),
                             [](double a, double b) { return a > b; });
            threshold = lows[options.n - 1];
            if (lows.capacity() * sizeof(double) > (size_t(8) << 20)) std::vector<double>().swap(lows);
        }
        for (size_t j = 0; j < pool.size(); ++j) {
            const ScoreBound b = bound_of(j);
            if (!(b.hi < threshold)) bounds.push_back(b);
        }
    }
    return bounds;
}

// Bounds from the screened summaries (or the drawn sample), then pass 2.
std::vector<Recommendation> select_for_plan(const Posterior& p, std::span<const double> max_item_norm,
                                            const Plan& plan, const ScreenJob& job) {
    const std::vector<uint32_t>& pool = plan.pool;
    if (pool.empty()) return {};
    const RecommendOptions& options = *plan.options;
    const uint32_t S = p.num_samples;
    const std::span<const float> tau(p.noise_precision);
    const Viewer& viewer = plan.viewer;
    std::vector<ScoreBound> bounds = pass_one_bounds(p, max_item_norm, plan, job);

    // ---- pass 2: exact scores where they can matter
    // Every item's reference means are computed once: the answer's
    // predictions reuse those of its scores (each a read of S scattered rows).
    std::unordered_map<uint32_t, std::vector<double>> computed;
    auto means_of = [&](uint32_t item) -> const std::vector<double>& {
        auto [at, fresh] = computed.try_emplace(item);
        if (fresh) reference_means(p, viewer, item, at->second);
        return at->second;
    };
    auto exact = [&](uint32_t item) -> double {
        if (options.rank_by == RankBy::draw) return reference_mean(p, viewer, plan.drawn, item);
        const auto& means = means_of(item);
        return plan.by_quantile ? mixture_quantile(means, tau, plan.prob) : mixture_mean(means);
    };
    // A quantile below t shows as F(x) > p at x a little under t (the pad
    // covers the quantile solver's tolerance). On screened means (each
    // within slack of the reference) the test point moves down by the
    // slack; the partial CDF sum only grows, so it stops once past p.
    auto below = [&](uint32_t item, double t) -> bool {
        if (!plan.by_quantile) return false;
        const size_t j = plan.full_pass ? item
                                        : static_cast<size_t>(std::lower_bound(pool.begin(), pool.end(), item) -
                                                              pool.begin());
        const float* row = job.rows.data() + j * S;
        const double x = t - pad(t) - job.slack, target = (plan.prob + 1e-12) * S;
        double partial = 0.0;
        for (uint32_t s = 0; s < S; ++s) {
            partial += normal_cdf(std::sqrt(static_cast<double>(tau[s])) * (x - row[s]));
            if (partial > target) return true;
        }
        return false;
    };
    const auto top = select_top_n(std::move(bounds), options.n, exact, below);

    std::vector<Recommendation> out;
    out.reserve(top.size());
    for (const auto& t : top) {
        const auto& means = means_of(t.item);
        out.push_back({t.item, t.score, clip(p, t.score), prediction_from(p, means, options.level)});
    }
    return out;
}

// Per-thread buffers, so a request allocates little beyond its answer. A
// server has many threads, so each keeps only a few jobs' buffers, and no
// large quantile rows ([I][S] floats) between requests.
struct Scratch {
    // Jobs kept between requests: as many as a batch holds (server/config.hpp's
    // default batch is 16) while their summaries stay small, so a busy lane
    // does not allocate and fault in fresh pages for every pass.
    static constexpr size_t kKeptJobs = 16;
    static constexpr size_t kKeptJobBytes = size_t(4) << 20;
    static constexpr size_t kKeptRowBytes = size_t(8) << 20;

    std::vector<Plan> plans;
    std::vector<ScreenJob> jobs;
    void reserve(size_t n) {
        if (plans.size() < n) plans.resize(n);
        if (jobs.size() < n) jobs.resize(n);
    }
    void trim() {
        size_t keep = 0, bytes = 0;
        for (; keep < jobs.size() && keep < kKeptJobs; ++keep) {
            bytes += (jobs[keep].sum.capacity() + jobs[keep].magnitude.capacity()) * sizeof(double);
            if (bytes > kKeptJobBytes) break;
        }
        if (jobs.size() > keep) jobs.resize(std::max<size_t>(keep, 1));
        if (plans.size() > kKeptJobs) plans.resize(kKeptJobs);
        for (ScreenJob& job : jobs)
            if (job.rows.capacity() * sizeof(float) > kKeptRowBytes) std::vector<float>().swap(job.rows);
    }
};

// Trims the scratch however the request ends.
struct TrimOnExit {
    Scratch& scratch;
    ~TrimOnExit() { scratch.trim(); }
};

Scratch& scratch() {
    thread_local Scratch s;
    return s;
}

std::vector<Recommendation> rank_for_viewer(const Posterior& p, std::span<const double> max_item_norm,
                                            const ItemBiasTotals& bias_totals, const HalfItemBlocks& half,
                                            const Viewer& viewer, std::span<const uint32_t> exclude,
                                            const RecommendOptions& options) {
    Scratch& s = scratch();
    const TrimOnExit trim{s};
    s.reserve(1);
    Plan& plan = s.plans[0];
    ScreenJob& job = s.jobs[0];
    make_plan(p, viewer, exclude, options, plan);
    screen_alone(p, max_item_norm, bias_totals, half, plan, job);
    return select_for_plan(p, max_item_norm, plan, job);
}

}  // namespace

std::vector<uint32_t> request_candidates(const Posterior& p, std::span<const uint32_t> exclude,
                                         const RecommendOptions& options) {
    if (options.n == 0) throw OptionError("the number of recommendations n must be at least 1");
    check_level(options.level);
    const uint32_t I = p.num_items;
    std::vector<uint32_t> pool;
    if (options.candidates) {
        pool = *options.candidates;
        for (uint32_t i : pool)
            if (i >= I)
                throw std::invalid_argument("candidate item index " + std::to_string(i) + " is beyond the model's " +
                                            std::to_string(I) + " items");
        std::sort(pool.begin(), pool.end());
        pool.erase(std::unique(pool.begin(), pool.end()), pool.end());
    } else {
        pool.resize(I);
        for (uint32_t i = 0; i < I; ++i) pool[i] = i;
    }
    if (options.exclude_rated && !exclude.empty()) {
        std::vector<char> excluded(I, 0);
        for (uint32_t i : exclude) {
            if (i >= I)
                throw std::invalid_argument("excluded item index " + std::to_string(i) + " is beyond the model's " +
                                            std::to_string(I) + " items");
            excluded[i] = 1;
        }
        std::erase_if(pool, [&](uint32_t i) { return excluded[i] != 0; });
    }
    return pool;
}

uint32_t drawn_sample(uint64_t draw_seed, uint32_t samples) {
    return static_cast<uint32_t>(Rng::keyed(draw_seed, 0, 0, StreamBlock::serve, 0).below(samples));
}

PredictionEngine::PredictionEngine(std::shared_ptr<const Posterior> posterior, EngineOptions options)
    : posterior_(std::move(posterior)) {
    if (!posterior_) throw std::invalid_argument("prediction engine needs a posterior");
    max_item_norm_ = max_item_norms(*posterior_);
    bias_totals_ = std::make_shared<const ItemBiasTotals>(item_bias_totals(*posterior_));
    half_blocks_ = std::make_shared<const HalfItemBlocks>(options.half_precision_screening
                                                              ? half_item_blocks(*posterior_)
                                                              : HalfItemBlocks{});
}

void PredictionEngine::sample_means(uint32_t user, uint32_t item, std::vector<double>& out) const {
    reference_means(*posterior_, known_user(*posterior_, user), item, out);
}

Prediction PredictionEngine::predict(uint32_t user, uint32_t item, double level) const {
    check_level(level);
    const Posterior& p = *posterior_;
    if (user >= p.num_users || item >= p.num_items)
        throw std::out_of_range("predict: user " + std::to_string(user) + " or item " + std::to_string(item) +
                                " is beyond the model's " + std::to_string(p.num_users) + " users and " +
                                std::to_string(p.num_items) + " items");
    std::vector<double> m;
    sample_means(user, item, m);
    return prediction_from(p, m, level);
}

std::vector<Recommendation> PredictionEngine::recommend(uint32_t user, const RecommendOptions& options) const {
    const Posterior& p = *posterior_;
    if (user >= p.num_users)
        throw std::out_of_range("recommend: user index " + std::to_string(user) + " is beyond the model's " +
                                std::to_string(p.num_users) + " users");
    return rank_for_viewer(p, max_item_norm_, *bias_totals_, *half_blocks_, known_user(p, user), p.rated_by(user),
                           options);
}

std::vector<RecommendAnswer> PredictionEngine::recommend_batch(std::span<const RecommendRequest> requests,
                                                               int threads) const {
    const Posterior& p = *posterior_;
    const size_t count = requests.size();
    std::vector<RecommendAnswer> answers(count);
    Scratch& s = scratch();
    const TrimOnExit trim{s};
    s.reserve(count);
    std::vector<char> planned(count, 0);
    for (size_t k = 0; k < count; ++k) {
        try {
            const uint32_t user = requests[k].user;
            if (user >= p.num_users)
                throw std::out_of_range("recommend: user index " + std::to_string(user) + " is beyond the model's " +
                                        std::to_string(p.num_users) + " users");
            make_plan(p, known_user(p, user), p.rated_by(user), requests[k].options, s.plans[k]);
            planned[k] = 1;
        } catch (const std::bad_alloc&) {
            throw;
        } catch (...) {
            answers[k].error = std::current_exception();
        }
    }
    // One shared pass for every full-pass request; the rest screen alone.
    std::vector<ScreenJob*> shared;
    for (size_t k = 0; k < count; ++k) {
        if (!planned[k]) continue;
        if (s.plans[k].full_pass && !s.plans[k].pool.empty()) {
            prepare_job(s.plans[k], s.jobs[k]);
            shared.push_back(&s.jobs[k]);
        } else {
            screen_alone(p, max_item_norm_, *bias_totals_, *half_blocks_, s.plans[k], s.jobs[k]);
        }
    }
    if (!shared.empty())
        screen_all_items(p, max_item_norm_, shared, threads, bias_totals_.get(), half_blocks_.get());
    // Pass 2 of each request is independent of the others' (it reads its
    // own plan and summaries and writes only its own answer): the team
    // shares the requests, so the selection of a batch (exact scores and
    // mixture quantiles, most of a request's CPU) is not serialized on one
    // core while the others idle. A request's answer is the same on any thread.
    std::exception_ptr out_of_memory;  // std::bad_alloc must not leave an OpenMP region
    const int team = threads > 1 && count > 1 ? static_cast<int>(std::min<size_t>(threads, count)) : 1;
#pragma omp parallel for num_threads(team) schedule(dynamic, 1)
    for (size_t k = 0; k < count; ++k) {
        if (!planned[k]) continue;
        try {
            answers[k].items = select_for_plan(p, max_item_norm_, s.plans[k], s.jobs[k]);
        } catch (const std::bad_alloc&) {
#pragma omp critical(credence_select_out_of_memory)
            out_of_memory = std::current_exception();
        } catch (...) {
            answers[k].error = std::current_exception();
        }
    }
    if (out_of_memory) std::rethrow_exception(out_of_memory);
    return answers;
}

std::vector<Recommendation> PredictionEngine::recommend_for_factors(std::span<const float> visitor_factors,
                                                                    std::span<const float> visitor_bias,
                                                                    std::span<const uint32_t> exclude,
                                                                    const RecommendOptions& options) const {
    const Posterior& p = *posterior_;
    const size_t S = p.num_samples, K = p.rank;
    if (visitor_factors.size() != S * K || visitor_bias.size() != S)
        throw std::invalid_argument("visitor needs " + std::to_string(S * K) + " factor values and " +
                                    std::to_string(S) + " biases (one per kept sample), got " +
                                    std::to_string(visitor_factors.size()) + " and " +
                                    std::to_string(visitor_bias.size()));
    Viewer v;
    v.factors = visitor_factors.data();
    v.factor_stride = K;
    v.bias = visitor_bias.data();
    v.bias_stride = 1;
    return rank_for_viewer(p, max_item_norm_, *bias_totals_, *half_blocks_, v, exclude, options);
}

}  // namespace credence
