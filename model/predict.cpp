// The prediction engine (model/predict.hpp).
//
// recommend() works in two passes so that a request over every item stays
// cheap while the ranking stays exact:
//   1. Screening (model/screening.hpp): every candidate's per-sample means in
//      float, from Eigen matrix-vector products over the item blocks, each
//      within a proven slack of the reference values. From them, an interval
//      certain to contain the candidate's exact score: the mixture mean +-
//      slack; for quantiles, the smallest and largest component quantile
//      (the mixture quantile lies between them, see model/mixture.cpp); for a
//      draw, the drawn sample's mean +- slack.
//   2. Selection (model/top_n.hpp): exact scores, from the reference means
//      exactly as predict() computes them, only for candidates whose interval
//      can still reach the top n; for quantile rankings a partial mixture-CDF
//      sum over the screened means rules out most of those first.
// Scores are unclipped (a clipped upper bound would tie every item whose
// bound passes the scale maximum); the Prediction carried with each item is
// clipped like predict()'s.
#include "model/predict.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include "model/inverse_normal.hpp"
#include "model/random.hpp"
#include "model/screening.hpp"
#include "model/top_n.hpp"

namespace credence {

namespace {

void check_level(double level) {
    if (!(level > 0.0 && level < 1.0))
        throw std::invalid_argument("interval level must be strictly between 0 and 1 (e.g. 0.9), got " +
                                    std::to_string(level));
}

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
// (1e-11 relative, model/mixture.cpp).
double pad(double x) { return 1e-8 * (1.0 + std::abs(x)); }

// The candidate items of one request, ascending and unique.
std::vector<uint32_t> candidate_pool(const Posterior& p, std::span<const uint32_t> exclude,
                                     const RecommendOptions& options) {
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

std::vector<Recommendation> rank_for_viewer(const Posterior& p, std::span<const double> max_item_norm,
                                            const Viewer& viewer, std::span<const uint32_t> exclude,
                                            const RecommendOptions& options) {
    if (options.n == 0) throw std::invalid_argument("number of recommendations n must be at least 1");
    check_level(options.level);
    const std::vector<uint32_t> pool = candidate_pool(p, exclude, options);
    if (pool.empty()) return {};

    const uint32_t S = p.num_samples;
    const std::span<const float> tau(p.noise_precision);
    const bool by_quantile = options.rank_by == RankBy::lower || options.rank_by == RankBy::upper;
    const double prob = options.rank_by == RankBy::lower ? 0.5 * (1.0 - options.level) : 0.5 * (1.0 + options.level);

    // ---- pass 1: an interval for every pool item
    std::vector<ScoreBound> bounds(pool.size());
    ScreenedMeans screened;
    uint32_t drawn = 0;
    if (options.rank_by == RankBy::draw) {
        // Thompson sampling over the mean: one kept sample, uniformly chosen.
        drawn = static_cast<uint32_t>(Rng::keyed(options.draw_seed, 0, 0, StreamBlock::serve, 0).below(S));
        std::vector<double> m;
        const double slack = screen_one_sample(p, max_item_norm, viewer, pool, drawn, m);
        for (size_t j = 0; j < pool.size(); ++j)
            bounds[j] = {pool[j], m[j] - slack - pad(m[j]), m[j] + slack + pad(m[j]), m[j]};
    } else {
        screened = screen_all_samples(p, max_item_norm, viewer, pool);
        const double slack = screened.slack;
        std::vector<double> shift(S);  // component quantile offset z / sqrt(tau_s)
        double noise_variance = 0.0;
        const double z = by_quantile ? normal_quantile(prob) : 0.0;
        for (uint32_t s = 0; s < S; ++s) {
            shift[s] = z / std::sqrt(static_cast<double>(tau[s]));
            noise_variance += 1.0 / static_cast<double>(tau[s]) / S;
        }
        for (size_t j = 0; j < pool.size(); ++j) {
            const auto row = screened.row(j);
            double sum = 0.0, sum_sq = 0.0;
            double lo = std::numeric_limits<double>::infinity(), hi = -lo;
            for (uint32_t s = 0; s < S; ++s) {
                const double m = row[s];
                sum += m;
                sum_sq += m * m;
                lo = std::min(lo, m + shift[s]);
                hi = std::max(hi, m + shift[s]);
            }
            const double mean = sum / S;
            if (by_quantile) {
                // Visit in the order of the normal with the mixture's moments.
                const double variance = std::max(0.0, sum_sq / S - mean * mean) + noise_variance;
                bounds[j] = {pool[j], lo - slack - pad(lo), hi + slack + pad(hi), mean + z * std::sqrt(variance)};
            } else {
                bounds[j] = {pool[j], mean - slack - pad(mean), mean + slack + pad(mean), mean};
            }
        }
    }

    // ---- pass 2: exact scores where they can matter
    std::vector<double> m;
    auto exact = [&](uint32_t item) -> double {
        if (options.rank_by == RankBy::draw) return reference_mean(p, viewer, drawn, item);
        reference_means(p, viewer, item, m);
        return by_quantile ? mixture_quantile(m, tau, prob) : mixture_mean(m);
    };
    // A quantile below t shows as F(x) > p at x a little under t. On screened
    // means (each within slack of the reference) the test point moves down by
    // the slack; the partial CDF sum only grows, so it stops once past p.
    const auto item_row = [&](uint32_t item) {
        const size_t j = static_cast<size_t>(std::lower_bound(pool.begin(), pool.end(), item) - pool.begin());
        return screened.row(j);
    };
    auto below = [&](uint32_t item, double t) -> bool {
        if (!by_quantile) return false;
        const auto row = item_row(item);
        const double x = t - pad(t) - screened.slack, target = (prob + 1e-12) * S;
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
        reference_means(p, viewer, t.item, m);
        out.push_back({t.item, t.score, prediction_from(p, m, options.level)});
    }
    return out;
}

}  // namespace

PredictionEngine::PredictionEngine(std::shared_ptr<const Posterior> posterior) : posterior_(std::move(posterior)) {
    if (!posterior_) throw std::invalid_argument("prediction engine needs a posterior");
    max_item_norm_ = max_item_norms(*posterior_);
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
    return rank_for_viewer(p, max_item_norm_, known_user(p, user), p.rated_by(user), options);
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
    return rank_for_viewer(p, max_item_norm_, v, exclude, options);
}

}  // namespace credence
