// Screening and reference per-sample means (model/screening.hpp).
//
// Rounding bound: a float dot product of length K, in any summation order,
// satisfies |fl(a.b) - a.b| <= gamma_K sum|a_k b_k| <= gamma_K |a| |b| with
// gamma_K = K u / (1 - K u), u = 2^-24 (Higham, Accuracy and Stability of
// Numerical Algorithms, 2nd ed., section 3.1). The bound is doubled to cover
// the double-precision reference and the norms' own rounding, and storing a
// screened mean as float adds at most |m| u.
#include "model/screening.hpp"

#include <Eigen/Core>
#include <algorithm>
#include <cmath>

namespace credence {

namespace {

using RowMajorF = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

constexpr double kFloatUnit = 0x1.0p-24;

double norm_of(const float* f, uint32_t K) {
    double sum = 0.0;
    for (uint32_t k = 0; k < K; ++k) sum += static_cast<double>(f[k]) * f[k];
    return std::sqrt(sum);
}

double dot_slack(uint32_t K, double norm_a, double norm_b) {
    const double gamma = K * kFloatUnit / (1.0 - K * kFloatUnit);
    return 2.0 * gamma * norm_a * norm_b * 1.001;
}

// The part of m_s that does not involve the factors.
double offset(const Posterior& p, const Viewer& v, uint32_t s, uint32_t item) {
    return static_cast<double>(p.global_mean) + v.bias_of(s) + static_cast<double>(p.item_bias_of(s, item));
}

// Items per tile: the tile's [S][tile] float scores stay in L2 while they
// are transposed into item-major rows.
constexpr uint32_t kTileItems = 256;

}  // namespace

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

double reference_mean(const Posterior& p, const Viewer& v, uint32_t s, uint32_t item) {
    const float* a = v.factor(s);
    const float* b = p.item_block(s) + static_cast<size_t>(item) * p.rank;
    double dot = 0.0;
    for (uint32_t k = 0; k < p.rank; ++k) dot += static_cast<double>(a[k]) * static_cast<double>(b[k]);
    return offset(p, v, s, item) + dot;
}

void reference_means(const Posterior& p, const Viewer& v, uint32_t item, std::vector<double>& out) {
    out.resize(p.num_samples);
    for (uint32_t s = 0; s < p.num_samples; ++s) out[s] = reference_mean(p, v, s, item);
}

std::vector<double> max_item_norms(const Posterior& p) {
    std::vector<double> out(p.num_samples, 0.0);
    for (uint32_t s = 0; s < p.num_samples; ++s)
        for (uint32_t i = 0; i < p.num_items; ++i)
            out[s] = std::max(out[s], norm_of(p.item_factor(s, i).data(), p.rank));
    return out;
}

ScreenedMeans screen_all_samples(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                                 const std::vector<uint32_t>& pool) {
    const uint32_t S = p.num_samples, K = p.rank;
    ScreenedMeans out;
    out.samples = S;
    out.values.resize(pool.size() * S);
    double dot = 0.0, largest = 0.0;
    for (uint32_t s = 0; s < S; ++s) dot = std::max(dot, dot_slack(K, norm_of(v.factor(s), K), max_item_norm[s]));
    const bool dense = pool.size() * 4 >= p.num_items;
    if (dense) {
        // Tile by item ranges; pool is ascending, so a tile's pool entries are
        // one contiguous run.
        Eigen::VectorXf tile_scores(kTileItems);
        size_t j0 = 0;
        for (uint32_t i0 = 0; i0 < p.num_items && j0 < pool.size(); i0 += kTileItems) {
            const uint32_t len = std::min(kTileItems, p.num_items - i0);
            size_t j1 = j0;
            while (j1 < pool.size() && pool[j1] < i0 + len) ++j1;
            if (j1 == j0) continue;
            for (uint32_t s = 0; s < S; ++s) {
                const Eigen::Map<const RowMajorF> V(p.item_block(s) + static_cast<size_t>(i0) * K, len, K);
                const Eigen::Map<const Eigen::VectorXf> u(v.factor(s), K);
                tile_scores.head(len).noalias() = V * u;
                for (size_t j = j0; j < j1; ++j) {
                    const double m = offset(p, v, s, pool[j]) + static_cast<double>(tile_scores[pool[j] - i0]);
                    out.values[j * S + s] = static_cast<float>(m);
                    largest = std::max(largest, std::abs(m));
                }
            }
            j0 = j1;
        }
    } else {
        for (size_t j = 0; j < pool.size(); ++j)
            for (uint32_t s = 0; s < S; ++s) {
                const Eigen::Map<const Eigen::VectorXf> a(v.factor(s), K);
                const Eigen::Map<const Eigen::VectorXf> b(p.item_block(s) + static_cast<size_t>(pool[j]) * K, K);
                const double m = offset(p, v, s, pool[j]) + static_cast<double>(b.dot(a));
                out.values[j * S + s] = static_cast<float>(m);
                largest = std::max(largest, std::abs(m));
            }
    }
    out.slack = dot + 2.0 * kFloatUnit * (1.0 + largest);
    return out;
}

double screen_one_sample(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                         const std::vector<uint32_t>& pool, uint32_t s, std::vector<double>& out) {
    const uint32_t K = p.rank;
    out.resize(pool.size());
    const Eigen::Map<const Eigen::VectorXf> u(v.factor(s), K);
    if (pool.size() * 4 >= p.num_items) {
        const Eigen::Map<const RowMajorF> V(p.item_block(s), p.num_items, K);
        const Eigen::VectorXf scores = V * u;
        for (size_t j = 0; j < pool.size(); ++j)
            out[j] = offset(p, v, s, pool[j]) + static_cast<double>(scores[pool[j]]);
    } else {
        for (size_t j = 0; j < pool.size(); ++j) {
            const Eigen::Map<const Eigen::VectorXf> b(p.item_block(s) + static_cast<size_t>(pool[j]) * K, K);
            out[j] = offset(p, v, s, pool[j]) + static_cast<double>(b.dot(u));
        }
    }
    return dot_slack(K, norm_of(v.factor(s), K), max_item_norm[s]);
}

}  // namespace credence
