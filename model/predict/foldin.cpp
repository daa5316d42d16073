// Visitor fold-in (model/predict/foldin.hpp).
//
// Ranking a visitor's items:
//   mean   the predictive mean is g + c_i + m_s . y_i averaged over samples:
//          exactly a known user's mean with factor m_s, so the engine's
//          screened, exact top-N (PredictionEngine::recommend_for_factors)
//          ranks it unchanged.
//   lower, upper  the mixture quantile depends on each item's own variances
//          y_i' P_s^-1 y_i + 1/tau_s, so one pass over the candidates computes
//          every per-sample mean and variance (a dot product and a triangular
//          product with L_s^-1, prepared once per request, over tiles of
//          items) and keeps the smallest and largest per-sample quantile: the
//          mixture quantile lies between them (model/predict/mixture.cpp).
//          select_top_n then computes exact mixture quantiles only where they
//          can matter, after a cheaper test (the mixture CDF at the current
//          threshold) has ruled out most candidates.
//   draw   one kept sample s* and one visitor draw under it: a known user's
//          draw ranking with that factor at s*.
// Every item's Prediction is then replaced by the exact visitor mixture.
#include "model/predict/foldin.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include <Eigen/Dense>
#include <fmt/format.h>

#include "model/error.hpp"
#include "model/math/random.hpp"
#include "model/math/standard_normal.hpp"
#include "model/predict/mixture.hpp"
#include "model/predict/screening.hpp"
#include "model/predict/top_n.hpp"

namespace credence {

namespace {

// The visitor's Gaussian conditional under sample s in information form:
// `precision` (lower triangle filled, then symmetrised) and h = precision * mean.
void visitor_conditional(const Posterior& p, std::span<const VisitorRating> ratings, uint32_t s,
                         Eigen::MatrixXd& precision, Eigen::VectorXd& h, Eigen::VectorXd& y) {
    const uint32_t K = p.rank;
    precision.setZero();
    h.setZero();
    for (uint32_t a = 0; a < K; ++a)
        for (uint32_t b = 0; b < K; ++b)
            precision(a, b) = p.user_lambda[(static_cast<size_t>(s) * K + a) * K + b];
    Eigen::Map<const Eigen::VectorXf> mu(p.user_mu.data() + static_cast<size_t>(s) * K, K);
    h.head(K) = precision.topLeftCorner(K, K) * mu.cast<double>();
    if (p.has_biases) precision(K, K) = p.user_bias_precision[s];  // bias prior mean is 0

    const double tau = p.noise_precision[s];
    for (const auto& r : ratings) {
        const auto v = p.item_factor(s, r.item);
        for (uint32_t k = 0; k < K; ++k) y(k) = v[k];
        if (p.has_biases) y(K) = 1.0;
        const double residual = r.rating - p.global_mean - p.item_bias_of(s, r.item);
        precision.selfadjointView<Eigen::Lower>().rankUpdate(y, tau);
        h += (tau * residual) * y;
    }
    precision = precision.selfadjointView<Eigen::Lower>();
}

// The conditional of sample s, factorized: P_s = L L' and the mean P_s^-1 h.
struct SampleConditional {
    Eigen::LLT<Eigen::MatrixXd> llt;
    Eigen::VectorXd mean;
};

// Throws NumericError when P_s is not positive definite.
void factor_conditional(const Posterior& p, std::span<const VisitorRating> ratings, uint32_t s,
                        SampleConditional& out) {
    const int D = static_cast<int>(p.rank) + (p.has_biases ? 1 : 0);
    Eigen::MatrixXd precision(D, D);
    Eigen::VectorXd h(D), y(D);
    visitor_conditional(p, ratings, s, precision, h, y);
    out.llt.compute(precision);
    if (out.llt.info() != Eigen::Success)
        throw NumericError("fold-in: the visitor's conditional precision under sample " + std::to_string(s) +
                           " is not positive definite; the model file may be corrupt");
    out.mean = out.llt.solve(h);
}

// One draw from Normal(mean, P^-1): x = mean + L^-T z has covariance
// (L L')^-1 = P^-1; z from Rng::keyed(seed, 0, 0, StreamBlock::foldin, s).
Eigen::VectorXd draw_under(const SampleConditional& c, uint64_t seed, uint32_t s) {
    Rng rng = Rng::keyed(seed, 0, 0, StreamBlock::foldin, s);
    Eigen::VectorXd z(c.mean.size());
    for (Eigen::Index d = 0; d < z.size(); ++d) z(d) = rng.normal();
    return c.mean + c.llt.matrixU().solve(z);
}

Viewer viewer_of(const VisitorPosterior& v, uint32_t rank) {
    Viewer out;
    out.factors = v.factor_mean.data();
    out.factor_stride = rank;
    out.bias = v.bias_mean.data();
    out.bias_stride = 1;
    return out;
}

// Mean and variance of a rating of `item` under sample s: the reference
// mean with factor m_s, and |L_s^-1 y|^2 + 1/tau_s, y = [V_i; 1].
inline void component(const Posterior& p, const VisitorPosterior& v, const Viewer& viewer, uint32_t s,
                      uint32_t item, double& mean, double& variance) {
    const uint32_t K = p.rank, D = v.dimension;
    mean = reference_mean(p, viewer, s, item);
    const float* f = p.item_block(s) + static_cast<size_t>(item) * K;
    const double* inverse = v.inverse_factor.data() + static_cast<size_t>(s) * D * D;
    double q = 0.0;
    for (uint32_t d = 0; d < D; ++d) {
        const double* row = inverse + static_cast<size_t>(d) * D;
        const uint32_t last = std::min(d + 1, K);
        double w = 0.0;
        for (uint32_t e = 0; e < last; ++e) w += row[e] * static_cast<double>(f[e]);
        if (d == K) w += row[K];  // the bias coordinate: y_K = 1
        q += w * w;
    }
    variance = q + 1.0 / static_cast<double>(p.noise_precision[s]);
}

// Margin for double rounding between the pass and the exact scores and for
// the quantile solver's tolerance (1e-11 relative, model/predict/mixture.cpp),
// as the engine pads its bounds.
double pad(double x) { return 1e-8 * (1.0 + std::abs(x)); }

std::vector<uint32_t> sorted_items(std::span<const VisitorRating> ratings) {
    std::vector<uint32_t> rated;
    rated.reserve(ratings.size());
    for (const auto& r : ratings) rated.push_back(r.item);
    std::sort(rated.begin(), rated.end());  // unique: check_visitor_ratings checked
    return rated;
}

// Bounds on a mixture quantile from per-sample quantiles. With q_s(a) the
// a-quantile of component s and F the mixture CDF (the mean of the
// component CDFs), the mixture's p-quantile q* satisfies, for the k-th
// smallest v_k of {q_s(a)}:
//   a >= p, k = ceil(p S / a):                q* <= v_k  (at v_k, k components
//                                              reach a, so F >= a k / S >= p)
//   a <= p, k = floor((p - a) S / (1 - a)) + 1: q* >= v_k  (below v_k at most
//                                              k - 1 components pass a, so
//                                              F <= ((k - 1) + (S - k + 1) a) / S <= p)
// a = p gives the plain bracket [min_s q_s(p), max_s q_s(p)] of
// model/predict/mixture.cpp; other a's are often much tighter, because the
// components' spread of means is smaller than their sds.
struct OrderBound {
    double z = 0.0;  // standard normal quantile of a
    size_t k = 1;    // 1-based order statistic
    bool upper = false;
};

// Besides a = p (the plain bracket), the a's on the side of p's tail: for
// p < 1/2, 2p and 4p for the upper bound and p/2 for the lower; mirrored for
// p >= 1/2. (Measured on a 9,000-item model: these cut the candidates that
// need a closer look about tenfold; a's farther out rarely win.)
std::vector<OrderBound> order_bounds(double p, uint32_t S) {
    std::vector<OrderBound> out;
    const bool low_tail = p < 0.5;
    const double tail = low_tail ? p : 1.0 - p;
    auto add_upper = [&](double a) {
        if (!(a > p && a < 1.0)) return;
        // The factor below 1 keeps k from rounding past its real value.
        const double k = std::ceil(p * S / a * (1.0 - 1e-12));
        out.push_back({normal_quantile(a), static_cast<size_t>(std::clamp(k, 1.0, double(S))), true});
    };
    auto add_lower = [&](double a) {
        if (!(a > 0.0 && a < p)) return;
        const double k = std::floor((p - a) * S / (1.0 - a) * (1.0 - 1e-12)) + 1.0;
        out.push_back({normal_quantile(a), static_cast<size_t>(std::clamp(k, 1.0, double(S))), false});
    };
    if (low_tail) {
        add_upper(2.0 * tail);
        add_upper(4.0 * tail);
        add_lower(0.5 * tail);
    } else {
        add_lower(1.0 - 2.0 * tail);
        add_lower(1.0 - 4.0 * tail);
        add_upper(1.0 - 0.5 * tail);
    }
    return out;
}

// Items per tile of the bounding pass: a tile's per-sample means and sds
// ([tile][S] doubles each) stay in cache while its bounds are taken.
constexpr size_t kTileItems = 256;

// Per-sample means and sds of a tile of `len` pool items under sample s,
// into means[j * S + s] and sds[j * S + s]. The item factors are gathered as
// the rows of Y = [V; 1] (coordinate-major, so every inner loop runs over
// the tile's items and vectorizes), whitened row by row (W = L_s^-1 Y, L_s^-1
// lower triangular), and the variance y' P_s^-1 y is a column's sum of
// squares. Its rounding differs from component()'s by a few units in the
// last place, far inside the pad the bounds get.
struct TileScratch {
    std::vector<double> y, w, q, dot;  // [D][tile], [tile], [tile], [tile]
};

void tile_components(const Posterior& p, const VisitorPosterior& v, const uint32_t* items, size_t len, uint32_t s,
                     TileScratch& t, double* means, double* sds) {
    const uint32_t S = p.num_samples, K = p.rank, D = v.dimension;
    const size_t T = kTileItems;
    const float* block = p.item_block(s);
    for (size_t j = 0; j < len; ++j) {
        const float* f = block + static_cast<size_t>(items[j]) * K;
        for (uint32_t k = 0; k < K; ++k) t.y[k * T + j] = static_cast<double>(f[k]);
    }
    if (D > K) std::fill_n(t.y.begin() + static_cast<std::ptrdiff_t>(K * T), len, 1.0);
    const double* inverse = v.inverse_factor.data() + static_cast<size_t>(s) * D * D;
    std::fill_n(t.q.begin(), len, 0.0);
    for (uint32_t d = 0; d < D; ++d) {
        const double* row = inverse + static_cast<size_t>(d) * D;
        double* w = t.w.data();
        const double* y0 = t.y.data();
        for (size_t j = 0; j < len; ++j) w[j] = row[0] * y0[j];
        for (uint32_t e = 1; e <= d; ++e) {
            const double* ye = t.y.data() + e * T;
            const double c = row[e];
            for (size_t j = 0; j < len; ++j) w[j] += c * ye[j];
        }
        for (size_t j = 0; j < len; ++j) t.q[j] += w[j] * w[j];
    }
    const float* m = v.factor_mean.data() + static_cast<size_t>(s) * K;
    std::fill_n(t.dot.begin(), len, 0.0);
    for (uint32_t k = 0; k < K; ++k) {
        const double c = static_cast<double>(m[k]);
        const double* yk = t.y.data() + k * T;
        for (size_t j = 0; j < len; ++j) t.dot[j] += c * yk[j];
    }
    const double offset = static_cast<double>(p.global_mean) + static_cast<double>(v.bias_mean[s]);
    const double noise_var = 1.0 / static_cast<double>(p.noise_precision[s]);
    for (size_t j = 0; j < len; ++j) {
        means[j * S + s] = offset + static_cast<double>(p.item_bias_of(s, items[j])) + t.dot[j];
        sds[j * S + s] = std::sqrt(t.q[j] + noise_var);
    }
}

// Bounds and a visiting estimate for every pool item.
std::vector<ScoreBound> quantile_bounds(const Posterior& p, const VisitorPosterior& v,
                                        const std::vector<uint32_t>& pool, double prob) {
    const uint32_t S = p.num_samples;
    const double z = normal_quantile(prob);
    const std::vector<OrderBound> orders = order_bounds(prob, S);
    TileScratch scratch{std::vector<double>(size_t(v.dimension) * kTileItems), std::vector<double>(kTileItems),
                        std::vector<double>(kTileItems), std::vector<double>(kTileItems)};
    std::vector<double> means(kTileItems * S), sds(kTileItems * S), values(S);
    std::vector<ScoreBound> bounds(pool.size());
    for (size_t first = 0; first < pool.size(); first += kTileItems) {
        const size_t len = std::min(kTileItems, pool.size() - first);
        for (uint32_t s = 0; s < S; ++s)
            tile_components(p, v, pool.data() + first, len, s, scratch, means.data(), sds.data());
        for (size_t j = 0; j < len; ++j) {
            const double* mj = means.data() + j * S;
            const double* sj = sds.data() + j * S;
            // a = p: the smallest and largest per-sample quantile.
            double lo = std::numeric_limits<double>::infinity(), hi = -lo;
            for (uint32_t s = 0; s < S; ++s) {
                const double q = mj[s] + z * sj[s];
                lo = std::min(lo, q);
                hi = std::max(hi, q);
            }
            for (const OrderBound& b : orders) {
                for (uint32_t s = 0; s < S; ++s) values[s] = mj[s] + b.z * sj[s];
                std::nth_element(values.begin(), values.begin() + static_cast<std::ptrdiff_t>(b.k - 1), values.end());
                const double v_k = values[b.k - 1];
                if (b.upper) hi = std::min(hi, v_k);
                else lo = std::max(lo, v_k);
            }
            // Visit in the order of the normal with the mixture's moments.
            double sum = 0.0, sum_sq = 0.0, sum_var = 0.0;
            for (uint32_t s = 0; s < S; ++s) sum += mj[s], sum_sq += mj[s] * mj[s], sum_var += sj[s] * sj[s];
            const double mean = sum / S;
            const double variance = std::max(0.0, sum_sq / S - mean * mean) + sum_var / S;
            bounds[first + j] = {pool[first + j], lo - pad(lo), hi + pad(hi), mean + z * std::sqrt(variance)};
        }
    }
    return bounds;
}

// Exact top-n by a mixture quantile (RankBy::lower or upper) over `pool`.
std::vector<ScoredItem> top_by_quantile(const Posterior& p, const VisitorPosterior& v,
                                        const std::vector<uint32_t>& pool, const RecommendOptions& options) {
    if (pool.empty()) return {};
    const uint32_t S = p.num_samples;
    const double prob = options.rank_by == RankBy::lower ? 0.5 * (1.0 - options.level) : 0.5 * (1.0 + options.level);
    std::vector<double> means, precisions;
    auto exact = [&](uint32_t item) {
        visitor_components(p, v, item, means, precisions);
        return mixture_quantile(means, precisions, prob);
    };
    // A quantile below t shows as F(x) > prob at x a little under t (the pad
    // covers the quantile solver's tolerance). Components are computed one
    // sample at a time and the test stops as soon as the answer is certain:
    // the partial CDF sum only grows, and each sample adds at most 1.
    const Viewer viewer = viewer_of(v, p.rank);
    auto below = [&](uint32_t item, double t) {
        const double x = t - pad(t), target = (prob + 1e-12) * S;
        double partial = 0.0;
        for (uint32_t s = 0; s < S; ++s) {
            double mean, variance;
            component(p, v, viewer, s, item, mean, variance);
            partial += normal_cdf((x - mean) / std::sqrt(variance));
            if (partial > target) return true;
            if (partial + (S - 1 - s) <= target) return false;
        }
        return false;
    };
    return select_top_n(quantile_bounds(p, v, pool, prob), options.n, exact, below);
}

}  // namespace

void check_visitor_ratings(const Posterior& p, std::span<const VisitorRating> ratings) {
    std::vector<uint32_t> items;
    items.reserve(ratings.size());
    for (const auto& r : ratings) {
        if (r.item >= p.num_items)
            throw std::out_of_range("fold-in: item index " + std::to_string(r.item) + " is not below " +
                                    std::to_string(p.num_items));
        const std::string& id = p.item_ids[r.item];
        if (!(r.rating >= p.scale.min && r.rating <= p.scale.max))
            throw DataError(fmt::format("rating {} for item '{}' is outside the scale [{}, {}]", r.rating, id,
                                        p.scale.min, p.scale.max));
        items.push_back(r.item);
    }
    std::sort(items.begin(), items.end());
    if (const auto twice = std::adjacent_find(items.begin(), items.end()); twice != items.end())
        throw DataError(fmt::format("item '{}' is rated twice; give each item once", p.item_ids[*twice]));
}

VisitorPosterior fold_in(const Posterior& p, std::span<const VisitorRating> ratings) {
    check_visitor_ratings(p, ratings);
    const uint32_t S = p.num_samples, K = p.rank;
    const uint32_t D = K + (p.has_biases ? 1 : 0);
    VisitorPosterior out;
    out.dimension = D;
    out.factor_mean.resize(static_cast<size_t>(S) * K);
    out.bias_mean.assign(S, 0.0f);
    out.inverse_factor.resize(static_cast<size_t>(S) * D * D);
    SampleConditional c;
    for (uint32_t s = 0; s < S; ++s) {
        factor_conditional(p, ratings, s, c);
        for (uint32_t k = 0; k < K; ++k) out.factor_mean[static_cast<size_t>(s) * K + k] = static_cast<float>(c.mean(k));
        if (p.has_biases) out.bias_mean[s] = static_cast<float>(c.mean(K));
        const Eigen::MatrixXd inverse =
            c.llt.matrixL().solve(Eigen::MatrixXd::Identity(static_cast<Eigen::Index>(D), static_cast<Eigen::Index>(D)));
        Eigen::Map<Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>>(
            out.inverse_factor.data() + static_cast<size_t>(s) * D * D, D, D) = inverse.triangularView<Eigen::Lower>();
    }
    return out;
}

VisitorFactors fold_in_visitor(const Posterior& p, std::span<const VisitorRating> ratings, uint64_t seed) {
    check_visitor_ratings(p, ratings);
    const uint32_t S = p.num_samples, K = p.rank;
    VisitorFactors out;
    out.factors.resize(static_cast<size_t>(S) * K);
    out.bias.assign(S, 0.0f);
    SampleConditional c;
    for (uint32_t s = 0; s < S; ++s) {
        factor_conditional(p, ratings, s, c);
        const Eigen::VectorXd x = draw_under(c, seed, s);
        for (uint32_t k = 0; k < K; ++k) out.factors[static_cast<size_t>(s) * K + k] = static_cast<float>(x(k));
        if (p.has_biases) out.bias[s] = static_cast<float>(x(K));
    }
    return out;
}

void visitor_components(const Posterior& p, const VisitorPosterior& v, uint32_t item, std::vector<double>& means,
                        std::vector<double>& precisions) {
    const uint32_t S = p.num_samples;
    const Viewer viewer = viewer_of(v, p.rank);
    means.resize(S);
    precisions.resize(S);
    for (uint32_t s = 0; s < S; ++s) {
        double variance;
        component(p, v, viewer, s, item, means[s], variance);
        precisions[s] = 1.0 / variance;
    }
}

Prediction predict_for_visitor(const Posterior& p, const VisitorPosterior& v, uint32_t item, double level) {
    if (!(level > 0.0 && level < 1.0))
        throw OptionError("interval level must be strictly between 0 and 1 (e.g. 0.9), got " + std::to_string(level));
    if (item >= p.num_items)
        throw std::out_of_range("predict_for_visitor: item " + std::to_string(item) + " is beyond the model's " +
                                std::to_string(p.num_items) + " items");
    std::vector<double> means, precisions;
    visitor_components(p, v, item, means, precisions);
    const auto clip = [&](double x) {
        return std::clamp(x, static_cast<double>(p.scale.min), static_cast<double>(p.scale.max));
    };
    Prediction out;
    out.mean = clip(mixture_mean(means));
    out.sd = mixture_sd(means, precisions);
    out.lower = clip(mixture_quantile(means, precisions, 0.5 * (1.0 - level)));
    out.upper = clip(mixture_quantile(means, precisions, 0.5 * (1.0 + level)));
    return out;
}

std::vector<Recommendation> recommend_for_visitor(const PredictionEngine& engine,
                                                  std::span<const VisitorRating> ratings,
                                                  const RecommendOptions& options) {
    const Posterior& p = engine.posterior();
    const VisitorPosterior visitor = fold_in(p, ratings);
    const std::vector<uint32_t> rated = sorted_items(ratings);
    std::vector<Recommendation> out;
    if (options.rank_by == RankBy::lower || options.rank_by == RankBy::upper) {
        const std::vector<uint32_t> pool = request_candidates(p, rated, options);
        for (const auto& t : top_by_quantile(p, visitor, pool, options)) out.push_back({t.item, t.score, {}});
    } else if (options.rank_by == RankBy::draw) {
        // The engine's draw ranking with the visitor's draw at the sample it draws.
        const uint32_t K = p.rank, s = drawn_sample(options.draw_seed, p.num_samples);
        SampleConditional c;
        factor_conditional(p, ratings, s, c);
        const Eigen::VectorXd x = draw_under(c, options.draw_seed, s);
        std::vector<float> factors = visitor.factor_mean, bias = visitor.bias_mean;
        for (uint32_t k = 0; k < K; ++k) factors[static_cast<size_t>(s) * K + k] = static_cast<float>(x(k));
        if (p.has_biases) bias[s] = static_cast<float>(x(K));
        out = engine.recommend_for_factors(factors, bias, rated, options);
    } else {
        out = engine.recommend_for_factors(visitor.factor_mean, visitor.bias_mean, rated, options);
    }
    for (auto& r : out) r.prediction = predict_for_visitor(p, visitor, r.item, options.level);
    return out;
}

}  // namespace credence
