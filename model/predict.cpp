// The prediction engine (model/predict.hpp).
//
// recommend() works in two passes so that a request over every item stays
// cheap while the ranking stays exact:
//   1. Screening: each kept sample's item block is scored against the user's
//      factor with one float matrix-vector product (Eigen), giving for every
//      candidate an interval certain to contain its exact score: the mixture
//      mean, the component-quantile bracket of the mixture quantile, or one
//      sample's mean, widened by a rigorous bound on the float rounding.
//   2. Selection (model/top_n.hpp): exact scores, in double precision from the
//      sample arrays exactly as predict() computes them, only for candidates
//      whose interval can still reach the top n.
// Scores are unclipped (a clipped upper bound would tie every item whose
// bound passes the scale maximum); the Prediction carried with each item is
// clipped like predict()'s.
#include "model/predict.hpp"

#include <Eigen/Core>
#include <algorithm>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include "model/normal.hpp"
#include "model/random.hpp"
#include "model/top_n.hpp"

namespace credence {

namespace {

using RowMajorF = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

// Whoever receives recommendations: a known user or a folded-in visitor.
struct Viewer {
    const float* factors = nullptr;  // sample s's factor at factors + s * factor_stride
    size_t factor_stride = 0;
    const float* bias = nullptr;     // sample s's bias at bias[s * bias_stride]; null means 0
    size_t bias_stride = 0;

    const float* factor(uint32_t s) const { return factors + static_cast<size_t>(s) * factor_stride; }
    double bias_of(uint32_t s) const { return bias ? static_cast<double>(bias[s * bias_stride]) : 0.0; }
};

Viewer known_user(const Posterior& p, uint32_t user) {
    Viewer v;
    v.factors = p.user_factors.data() + static_cast<size_t>(user) * p.rank;
    v.factor_stride = static_cast<size_t>(p.num_users) * p.rank;
    if (p.has_biases) {
        v.bias = p.user_bias.data() + user;
        v.bias_stride = p.num_users;
    }
    return v;
}

// The offset of m_s that does not involve the factors.
double sample_offset(const Posterior& p, const Viewer& v, uint32_t s, uint32_t item) {
    return static_cast<double>(p.global_mean) + v.bias_of(s) + static_cast<double>(p.item_bias_of(s, item));
}

// m_s for every sample, in double precision: the reference values.
void viewer_sample_means(const Posterior& p, const Viewer& v, uint32_t item, std::vector<double>& out) {
    out.resize(p.num_samples);
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        const float* a = v.factor(s);
        const float* b = p.item_block(s) + static_cast<size_t>(item) * p.rank;
        double dot = 0.0;
        for (uint32_t k = 0; k < p.rank; ++k) dot += static_cast<double>(a[k]) * static_cast<double>(b[k]);
        out[s] = sample_offset(p, v, s, item) + dot;
    }
}

double viewer_one_sample_mean(const Posterior& p, const Viewer& v, uint32_t s, uint32_t item) {
    const float* a = v.factor(s);
    const float* b = p.item_block(s) + static_cast<size_t>(item) * p.rank;
    double dot = 0.0;
    for (uint32_t k = 0; k < p.rank; ++k) dot += static_cast<double>(a[k]) * static_cast<double>(b[k]);
    return sample_offset(p, v, s, item) + dot;
}

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

// Rounding bound for a float dot product of length K, any summation order:
// |fl(a.b) - a.b| <= gamma_K sum|a_k b_k| <= gamma_K |a| |b| (Higham,
// Accuracy and Stability of Numerical Algorithms, 2nd ed., section 3.1),
// doubled to also cover the double-precision reference and the norms' own
// rounding.
double float_dot_slack(uint32_t K, double norm_a, double norm_b) {
    const double u = std::ldexp(1.0, -24);
    const double gamma = K * u / (1.0 - K * u);
    return 2.0 * gamma * norm_a * norm_b * 1.001;
}

// Padding for double rounding in offsets and the quantile solver's tolerance.
double pad(double x) { return 1e-8 * (1.0 + std::abs(x)); }

// The candidate items of one request, in ascending order.
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

// Float scores <V_i,s, factor> for the pool items of one sample: one matrix-
// vector product over the whole item block when the pool is most items,
// per-item dot products otherwise.
class PoolScorer {
public:
    PoolScorer(const Posterior& p, const std::vector<uint32_t>& pool)
        : p_(p), pool_(pool), dense_(pool.size() * 4 >= p.num_items), full_(dense_ ? p.num_items : 0) {}

    // out[j] = score of pool[j]
    void score(uint32_t s, const float* factor, std::vector<float>& out) {
        const Eigen::Map<const Eigen::VectorXf> u(factor, p_.rank);
        out.resize(pool_.size());
        if (dense_) {
            const Eigen::Map<const RowMajorF> V(p_.item_block(s), p_.num_items, p_.rank);
            full_.noalias() = V * u;
            for (size_t j = 0; j < pool_.size(); ++j) out[j] = full_[pool_[j]];
        } else {
            for (size_t j = 0; j < pool_.size(); ++j) {
                const Eigen::Map<const Eigen::VectorXf> v(p_.item_block(s) + static_cast<size_t>(pool_[j]) * p_.rank,
                                                          p_.rank);
                out[j] = v.dot(u);
            }
        }
    }

private:
    const Posterior& p_;
    const std::vector<uint32_t>& pool_;
    bool dense_;
    Eigen::VectorXf full_;
};

double factor_norm(const float* f, uint32_t K) {
    double sum = 0.0;
    for (uint32_t k = 0; k < K; ++k) sum += static_cast<double>(f[k]) * f[k];
    return std::sqrt(sum);
}

}  // namespace

PredictionEngine::PredictionEngine(std::shared_ptr<const Posterior> posterior) : posterior_(std::move(posterior)) {
    if (!posterior_) throw std::invalid_argument("prediction engine needs a posterior");
    const Posterior& p = *posterior_;
    max_item_norm_.assign(p.num_samples, 0.0);
    for (uint32_t s = 0; s < p.num_samples; ++s)
        for (uint32_t i = 0; i < p.num_items; ++i)
            max_item_norm_[s] = std::max(max_item_norm_[s], factor_norm(p.item_factor(s, i).data(), p.rank));
}

void PredictionEngine::sample_means(uint32_t user, uint32_t item, std::vector<double>& out) const {
    viewer_sample_means(*posterior_, known_user(*posterior_, user), item, out);
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

namespace {

std::vector<Recommendation> rank_for_viewer(const Posterior& p, const std::vector<double>& max_item_norm,
                                            const Viewer& viewer, std::span<const uint32_t> exclude,
                                            const RecommendOptions& options) {
    if (options.n == 0) throw std::invalid_argument("number of recommendations n must be at least 1");
    check_level(options.level);
    const std::vector<uint32_t> pool = candidate_pool(p, exclude, options);
    if (pool.empty()) return {};

    const uint32_t S = p.num_samples;
    const double p_lower = 0.5 * (1.0 - options.level), p_upper = 0.5 * (1.0 + options.level);
    uint32_t drawn_sample = 0;
    if (options.rank_by == RankBy::draw)
        drawn_sample = static_cast<uint32_t>(Rng::keyed(options.draw_seed, 0, 0, StreamBlock::serve, 0).below(S));

    // ---- pass 1: bounds for every pool item
    std::vector<ScoreBound> bounds(pool.size());
    for (size_t j = 0; j < pool.size(); ++j) bounds[j].item = pool[j];
    PoolScorer scorer(p, pool);
    std::vector<float> scores;
    double slack = 0.0;
    auto slack_of = [&](uint32_t s) {
        return float_dot_slack(p.rank, factor_norm(viewer.factor(s), p.rank), max_item_norm[s]);
    };
    switch (options.rank_by) {
        case RankBy::mean: {
            std::vector<double> sum(pool.size(), 0.0);
            for (uint32_t s = 0; s < S; ++s) {
                scorer.score(s, viewer.factor(s), scores);
                for (size_t j = 0; j < pool.size(); ++j)
                    sum[j] += sample_offset(p, viewer, s, pool[j]) + static_cast<double>(scores[j]);
                slack = std::max(slack, slack_of(s));
            }
            for (size_t j = 0; j < pool.size(); ++j) {
                const double mean = sum[j] / S;
                bounds[j].lo = mean - slack - pad(mean);
                bounds[j].hi = mean + slack + pad(mean);
            }
            break;
        }
        case RankBy::lower:
        case RankBy::upper: {
            // The mixture quantile lies between the smallest and largest
            // component quantile (see model/mixture.cpp).
            const double z = standard_normal_quantile(options.rank_by == RankBy::lower ? p_lower : p_upper);
            for (size_t j = 0; j < pool.size(); ++j) {
                bounds[j].lo = std::numeric_limits<double>::infinity();
                bounds[j].hi = -std::numeric_limits<double>::infinity();
            }
            for (uint32_t s = 0; s < S; ++s) {
                scorer.score(s, viewer.factor(s), scores);
                const double shift = z / std::sqrt(static_cast<double>(p.noise_precision[s]));
                for (size_t j = 0; j < pool.size(); ++j) {
                    const double q = sample_offset(p, viewer, s, pool[j]) + static_cast<double>(scores[j]) + shift;
                    bounds[j].lo = std::min(bounds[j].lo, q);
                    bounds[j].hi = std::max(bounds[j].hi, q);
                }
                slack = std::max(slack, slack_of(s));
            }
            for (auto& b : bounds) {
                b.lo -= slack + pad(b.lo);
                b.hi += slack + pad(b.hi);
            }
            break;
        }
        case RankBy::draw: {
            scorer.score(drawn_sample, viewer.factor(drawn_sample), scores);
            slack = slack_of(drawn_sample);
            for (size_t j = 0; j < pool.size(); ++j) {
                const double m = sample_offset(p, viewer, drawn_sample, pool[j]) + static_cast<double>(scores[j]);
                bounds[j].lo = m - slack - pad(m);
                bounds[j].hi = m + slack + pad(m);
            }
            break;
        }
    }

    // ---- pass 2: exact scores where they can matter
    std::vector<double> m;
    const std::span<const float> tau(p.noise_precision);
    auto exact = [&](uint32_t item) -> double {
        if (options.rank_by == RankBy::draw) return viewer_one_sample_mean(p, viewer, drawn_sample, item);
        viewer_sample_means(p, viewer, item, m);
        switch (options.rank_by) {
            case RankBy::lower: return mixture_quantile(m, tau, p_lower);
            case RankBy::upper: return mixture_quantile(m, tau, p_upper);
            default: return mixture_mean(m);
        }
    };
    const auto top = select_top_n(std::move(bounds), options.n, exact);

    std::vector<Recommendation> out;
    out.reserve(top.size());
    for (const auto& t : top) {
        viewer_sample_means(p, viewer, t.item, m);
        out.push_back({t.item, t.score, prediction_from(p, m, options.level)});
    }
    return out;
}

}  // namespace

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
