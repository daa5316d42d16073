#include "model/predict/item_statistics.hpp"

#include <algorithm>
#include <cmath>
#include <numeric>
#include <stdexcept>
#include <string>

#include <Eigen/Dense>

#include "model/error.hpp"

namespace credence {

namespace {

using MatrixXdR = Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using MatrixXfR = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

// Lambda^-1 for each sample's K x K precision matrix.
std::vector<double> invert_precisions(const std::vector<float>& lambda, uint32_t S, uint32_t K, const char* who) {
    std::vector<double> cov(static_cast<size_t>(S) * K * K);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const MatrixXfR> L(lambda.data() + static_cast<size_t>(s) * K * K, K, K);
        Eigen::LLT<Eigen::MatrixXd> llt(L.cast<double>());
        if (llt.info() != Eigen::Success)
            throw NumericError(std::string("model: the ") + who + " hyperparameter precision of sample " +
                               std::to_string(s) + " is not positive definite; refit or check the file");
        Eigen::MatrixXd inv = llt.solve(Eigen::MatrixXd::Identity(K, K));
        Eigen::Map<MatrixXdR>(cov.data() + static_cast<size_t>(s) * K * K, K, K) = inv;
    }
    return cov;
}

std::vector<uint32_t> order_desc(const std::vector<double>& key) {
    std::vector<uint32_t> order(key.size());
    std::iota(order.begin(), order.end(), 0u);
    // Ties break by item index so lists are stable across loads.
    std::stable_sort(order.begin(), order.end(), [&](uint32_t a, uint32_t b) { return key[a] > key[b]; });
    return order;
}

// The mean xbar_s and second-moment matrix M_s of x_u = [U_u,s, b_u,s, 1]
// over users under sample s (see population_moments). With no users, the
// exact moments of an unseen user drawn from the sample's hyperparameter prior.
void user_moments(const Posterior& p, const HyperparameterCovariances& cov, uint32_t s, Eigen::MatrixXd& M,
                  Eigen::VectorXd& xbar) {
    const uint32_t U = p.num_users, K = p.rank;
    const int D = static_cast<int>(K) + 2;
    M = Eigen::MatrixXd::Zero(D, D);
    xbar = Eigen::VectorXd::Zero(D);
    if (U > 0) {
        MatrixXdR X(U, D);
        for (uint32_t u = 0; u < U; ++u) {
            const auto f = p.user_factor(s, u);
            for (uint32_t k = 0; k < K; ++k) X(u, k) = f[k];
            X(u, K) = p.user_bias_of(s, u);
            X(u, K + 1) = 1.0;
        }
        M.selfadjointView<Eigen::Lower>().rankUpdate(X.transpose(), 1.0 / U);
        M = M.selfadjointView<Eigen::Lower>();
        xbar = X.colwise().mean().transpose();
        return;
    }
    Eigen::Map<const Eigen::VectorXf> mu(p.user_mu.data() + static_cast<size_t>(s) * K, K);
    Eigen::Map<const MatrixXdR> sigma(cov.user_of(s), K, K);
    xbar.head(K) = mu.cast<double>();
    xbar(K + 1) = 1.0;
    M.topLeftCorner(K, K) = sigma + xbar.head(K) * xbar.head(K).transpose();
    M.block(0, K + 1, K, 1) = xbar.head(K);
    M.block(K + 1, 0, 1, K) = xbar.head(K).transpose();
    M(K, K) = p.has_biases ? 1.0 / p.user_bias_precision[s] : 0.0;
    M(K + 1, K + 1) = 1.0;
}

// Mean and sd of m_s(u,i) = g + b_u + b_i + u.v over users and samples, for
// every item, without touching U x I pairs: with x_u = [u, b_u, 1] and
// y_i = [v_i, 1, g + b_i], m = x_u.y_i, so the mean over users is xbar_s.y_i
// and the second moment is y_i' M_s y_i with M_s the users' second-moment
// matrix of x.
void population_moments(const Posterior& p, ItemStatistics& out) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    const int D = static_cast<int>(K) + 2;
    std::vector<double> sum(I, 0.0), sum_sq(I, 0.0);
    MatrixXdR Y(I, D);
    Eigen::MatrixXd M;
    Eigen::VectorXd xbar;
    for (uint32_t s = 0; s < S; ++s) {
        user_moments(p, out.covariances, s, M, xbar);
        for (uint32_t i = 0; i < I; ++i) {
            const auto v = p.item_factor(s, i);
            for (uint32_t k = 0; k < K; ++k) Y(i, k) = v[k];
            Y(i, K) = 1.0;
            Y(i, K + 1) = static_cast<double>(p.global_mean) + p.item_bias_of(s, i);
        }
        const Eigen::VectorXd mean_s = Y * xbar;
        const Eigen::VectorXd second_s = ((Y * M).cwiseProduct(Y)).rowwise().sum();
        for (uint32_t i = 0; i < I; ++i) {
            sum[i] += mean_s(i);
            sum_sq[i] += second_s(i);
        }
    }
    out.population_mean.resize(I);
    out.population_sd.resize(I);
    for (uint32_t i = 0; i < I; ++i) {
        const double mean = sum[i] / S;
        // Rounding can push a zero variance a hair below zero; that is not a
        // clamp of a real value, the exact variance is >= 0.
        out.population_mean[i] = mean;
        out.population_sd[i] = std::sqrt(std::max(0.0, sum_sq[i] / S - mean * mean));
    }
}

double clipped(const Posterior& p, double x) {
    return std::clamp(x, static_cast<double>(p.scale.min), static_cast<double>(p.scale.max));
}

// With no known customer: the mixture over samples of the unseen-customer
// Normals (mean g + c_i + mu_U.v_i, variance 1/tau + v' Sigma_U v + 1/lambda_b).
void unseen_customer_predictive(const Posterior& p, ItemStatistics& out) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    std::vector<double> sum(I, 0.0), sum_sq(I, 0.0);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const Eigen::VectorXf> mu(p.user_mu.data() + static_cast<size_t>(s) * K, K);
        Eigen::Map<const MatrixXdR> sigma(out.covariances.user_of(s), K, K);
        const double extra = 1.0 / static_cast<double>(p.noise_precision[s]) +
                             (p.has_biases ? 1.0 / static_cast<double>(p.user_bias_precision[s]) : 0.0);
        for (uint32_t i = 0; i < I; ++i) {
            const auto f = p.item_factor(s, i);
            const Eigen::VectorXd v = Eigen::Map<const Eigen::VectorXf>(f.data(), K).cast<double>();
            const double mean = static_cast<double>(p.global_mean) + p.item_bias_of(s, i) + mu.cast<double>().dot(v);
            sum[i] += mean;
            sum_sq[i] += extra + v.dot(sigma * v) + mean * mean;
        }
    }
    for (uint32_t i = 0; i < I; ++i) {
        const double mean = sum[i] / S;
        out.predictive_mean[i] = clipped(p, mean);
        out.predictive_sd[i] = std::sqrt(std::max(0.0, sum_sq[i] / S - mean * mean));  // rounding only
    }
}

// Every known customer's predictive mean and sd for every item, summed into
// the per-item averages. The catalogue goes in chunks of items; each
// sample's factors of a chunk are first transposed to [K][chunk], so one
// customer's noise-free means over the chunk are K contiguous multiply-adds
// along the items (vectorized), in float as the engine's screening does.
// Customers go in blocks of kBlock so the per-pair sums (double) stay in
// cache while the samples stream by. Every item's arithmetic is the same
// whatever the chunk (items never mix), so the chunking only bounds the
// transposed copy: at most kChunkBytes, where a whole-catalogue copy would
// have doubled the memory of a large model while it loads.
void known_customer_predictive(const Posterior& p, ItemStatistics& out) {
    constexpr uint32_t kBlock = 16;
    constexpr size_t kChunkBytes = size_t(32) << 20;
    const uint32_t S = p.num_samples, U = p.num_users, I = p.num_items, K = p.rank;
    double noise_variance = 0.0;  // mean over samples of 1/tau_s
    for (float tau : p.noise_precision) noise_variance += 1.0 / static_cast<double>(tau) / S;
    const uint32_t chunk = static_cast<uint32_t>(std::clamp<size_t>(
        kChunkBytes / (sizeof(float) * std::max<size_t>(1, static_cast<size_t>(S) * K)), 256, std::max(I, 1u)));
    // [S][K][chunk]
    std::vector<float> transposed(static_cast<size_t>(S) * K * std::min(chunk, I));
    std::vector<float> m(chunk);
    std::vector<double> sum(static_cast<size_t>(kBlock) * chunk), sum_sq(sum.size());
    std::vector<double> mean_total(I, 0.0), sd_total(I, 0.0);
    for (uint32_t i0 = 0; i0 < I; i0 += chunk) {
        const uint32_t C = std::min(chunk, I - i0);  // items in this chunk
        for (uint32_t s = 0; s < S; ++s) {
            const float* block = p.item_block(s) + static_cast<size_t>(i0) * K;
            float* to = transposed.data() + static_cast<size_t>(s) * K * C;
            for (uint32_t i = 0; i < C; ++i)
                for (uint32_t k = 0; k < K; ++k) to[static_cast<size_t>(k) * C + i] = block[static_cast<size_t>(i) * K + k];
        }
        for (uint32_t u0 = 0; u0 < U; u0 += kBlock) {
            const uint32_t b = std::min(kBlock, U - u0);
            std::fill(sum.begin(), sum.end(), 0.0);
            std::fill(sum_sq.begin(), sum_sq.end(), 0.0);
            for (uint32_t s = 0; s < S; ++s) {
                const float* item_bias =
                    p.has_biases ? p.item_bias.data() + static_cast<size_t>(s) * I + i0 : nullptr;
                const float* vt = transposed.data() + static_cast<size_t>(s) * K * C;
                for (uint32_t r = 0; r < b; ++r) {
                    const float base = p.global_mean + p.user_bias_of(s, u0 + r);
                    for (uint32_t i = 0; i < C; ++i) m[i] = base + (item_bias ? item_bias[i] : 0.0f);
                    const auto f = p.user_factor(s, u0 + r);
                    for (uint32_t k = 0; k < K; ++k) {
                        const float x = f[k];
                        const float* row = vt + static_cast<size_t>(k) * C;
                        for (uint32_t i = 0; i < C; ++i) m[i] += x * row[i];
                    }
                    double* row_sum = sum.data() + static_cast<size_t>(r) * C;
                    double* row_sq = sum_sq.data() + static_cast<size_t>(r) * C;
                    for (uint32_t i = 0; i < C; ++i) {
                        const double v = m[i];
                        row_sum[i] += v;
                        row_sq[i] += v * v;
                    }
                }
            }
            for (uint32_t r = 0; r < b; ++r)
                for (uint32_t i = 0; i < C; ++i) {
                    const size_t j = static_cast<size_t>(r) * C + i;
                    const double mean = sum[j] / S;
                    mean_total[i0 + i] += clipped(p, mean);
                    // The variance of the per-sample means is >= 0; rounding only.
                    sd_total[i0 + i] += std::sqrt(noise_variance + std::max(0.0, sum_sq[j] / S - mean * mean));
                }
        }
    }
    for (uint32_t i = 0; i < I; ++i) {
        out.predictive_mean[i] = mean_total[i] / U;
        out.predictive_sd[i] = sd_total[i] / U;
    }
}

void predictive_moments(const Posterior& p, ItemStatistics& out) {
    out.predictive_mean.assign(p.num_items, 0.0);
    out.predictive_sd.assign(p.num_items, 0.0);
    if (p.num_users == 0) unseen_customer_predictive(p, out);
    else known_customer_predictive(p, out);
}

// Factor mean, sd and spread over samples, and each sample's item norms.
void factor_moments(const Posterior& p, ItemStatistics& out) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    std::vector<double> sum(static_cast<size_t>(I) * K, 0.0), sum_sq(static_cast<size_t>(I) * K, 0.0);
    out.item_norm.resize(static_cast<size_t>(S) * I);
    for (uint32_t s = 0; s < S; ++s) {
        const float* block = p.item_block(s);
        for (uint32_t i = 0; i < I; ++i) {
            double norm_sq = 0.0;
            for (uint32_t k = 0; k < K; ++k) {
                const double x = block[static_cast<size_t>(i) * K + k];
                sum[static_cast<size_t>(i) * K + k] += x;
                sum_sq[static_cast<size_t>(i) * K + k] += x * x;
                norm_sq += x * x;
            }
            out.item_norm[static_cast<size_t>(s) * I + i] = static_cast<float>(std::sqrt(norm_sq));
        }
    }
    out.factor_mean.resize(static_cast<size_t>(I) * K);
    out.factor_sd.resize(static_cast<size_t>(I) * K);
    out.factor_spread.resize(I);
    for (uint32_t i = 0; i < I; ++i) {
        double spread_sq = 0.0;
        for (uint32_t k = 0; k < K; ++k) {
            const size_t j = static_cast<size_t>(i) * K + k;
            const double mean = sum[j] / S;
            const double var = std::max(0.0, sum_sq[j] / S - mean * mean);  // rounding only, as above
            out.factor_mean[j] = static_cast<float>(mean);
            out.factor_sd[j] = static_cast<float>(std::sqrt(var));
            spread_sq += var;
        }
        out.factor_spread[i] = std::sqrt(spread_sq / K);
    }
}

}  // namespace

HyperparameterCovariances hyperparameter_covariances(const Posterior& p) {
    HyperparameterCovariances out;
    out.rank = p.rank;
    out.num_samples = p.num_samples;
    out.user = invert_precisions(p.user_lambda, p.num_samples, p.rank, "user");
    out.item = invert_precisions(p.item_lambda, p.num_samples, p.rank, "item");
    return out;
}

ItemStatistics compute_item_statistics(const Posterior& p) {
    ItemStatistics out;
    out.num_items = p.num_items;
    out.rank = p.rank;
    out.num_samples = p.num_samples;
    out.rating_count.assign(p.num_items, 0);
    for (uint32_t i : p.rated_items) ++out.rating_count[i];

    out.covariances = hyperparameter_covariances(p);
    population_moments(p, out);
    factor_moments(p, out);
    predictive_moments(p, out);

    out.by_uncertainty = order_desc(out.predictive_sd);
    out.by_popularity = order_desc(std::vector<double>(out.rating_count.begin(), out.rating_count.end()));
    out.by_mean = order_desc(out.predictive_mean);
    return out;
}

std::vector<SimilarItem> similar_items(const Posterior& p, const ItemStatistics& statistics, uint32_t target,
                                       uint32_t n) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    if (statistics.num_items != I || statistics.rank != K || statistics.num_samples != S ||
        statistics.item_norm.size() != static_cast<size_t>(S) * I)
        throw std::invalid_argument("similar_items: the item statistics were computed from another posterior");
    if (target >= I)
        throw std::out_of_range("similar_items: item index " + std::to_string(target) + " is not below " +
                                std::to_string(I));
    // total(i): the sum over samples of the cosine; ranked by the sum, reported divided by S.
    Eigen::VectorXd total = Eigen::VectorXd::Zero(I);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const MatrixXfR> block(p.item_block(s), I, K);
        Eigen::Map<const Eigen::VectorXf> v(p.item_factor(s, target).data(), K);
        const Eigen::VectorXf dots = block * v;
        const float* norms = statistics.item_norm.data() + static_cast<size_t>(s) * I;
        const float own = norms[target];
        for (uint32_t i = 0; i < I; ++i) {
            const float denom = own * norms[i];
            // A zero factor has no direction; it counts as dissimilar (cosine 0).
            if (denom > 0.0f) total(i) += dots(i) / denom;
        }
    }
    std::vector<uint32_t> order;
    order.reserve(I);
    for (uint32_t i = 0; i < I; ++i)
        if (i != target) order.push_back(i);
    const size_t take = std::min<size_t>(n, order.size());
    std::partial_sort(order.begin(), order.begin() + take, order.end(), [&](uint32_t a, uint32_t b) {
        return total(a) != total(b) ? total(a) > total(b) : a < b;
    });
    std::vector<SimilarItem> out;
    out.reserve(take);
    for (size_t k = 0; k < take; ++k) out.push_back({order[k], total(order[k]) / S});
    return out;
}

std::vector<std::vector<SimilarItem>> most_similar_among_each(const Posterior& p, const ItemStatistics& statistics,
                                                              std::span<const uint32_t> targets,
                                                              std::span<const uint32_t> among, uint32_t n) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    if (statistics.num_items != I || statistics.rank != K || statistics.num_samples != S ||
        statistics.item_norm.size() != static_cast<size_t>(S) * I)
        throw std::invalid_argument("most_similar_among: the item statistics were computed from another posterior");
    for (uint32_t i : among)
        if (i >= I)
            throw std::out_of_range("most_similar_among: item index " + std::to_string(i) + " is not below " +
                                    std::to_string(I));
    for (uint32_t target : targets)
        if (target >= I)
            throw std::out_of_range("most_similar_among: item index " + std::to_string(target) + " is not below " +
                                    std::to_string(I));
    std::vector<uint32_t> items(among.begin(), among.end());
    std::sort(items.begin(), items.end());
    items.erase(std::unique(items.begin(), items.end()), items.end());
    // total[t * items + j]: sum over samples of the cosine of target t and
    // items[j]. Samples outermost, so each sample's factors of the rated
    // items are read from memory once for every target (widened and laid out
    // by rank, [K][count]). Each dot product still adds k = 0..K-1 in order
    // in double, and a float times a float is exact in double, so every
    // target gets the bits it would alone; blocks of items are only summed
    // side by side, which lets the sums overlap.
    const size_t count = items.size();
    constexpr size_t kBlock = 8;
    constexpr uint32_t kAhead = 4;  // samples
    const size_t padded = (count + kBlock - 1) / kBlock * kBlock;
    std::vector<double> total(targets.size() * count, 0.0);
    std::vector<double> by_rank(static_cast<size_t>(K) * padded, 0.0), dots(padded);
    // Each sample's norms of the rated items and targets, recomputed from
    // the rows being read anyway exactly as factor_moments() stores them
    // (the same double sum, then float): reading item_norm instead costs
    // another scattered cache line per item and sample.
    std::vector<float> item_norms(count), target_norms(targets.size());
    auto norm_of_row = [K](const float* row) {
        double norm_sq = 0.0;
        for (uint32_t k = 0; k < K; ++k) {
            const double x = row[k];
            norm_sq += x * x;
        }
        return static_cast<float>(std::sqrt(norm_sq));
    };
    for (uint32_t s = 0; s < S; ++s) {
        // The rows are scattered over the sample blocks: ask for those of a
        // sample kAhead on while this one is summed, so their memory
        // latencies overlap (one sample's work is too short to hide them).
        for (uint32_t ahead = s == 0 ? 1 : kAhead; ahead <= kAhead; ++ahead) {
            if (s + ahead >= S) break;
            for (uint32_t i : items) __builtin_prefetch(p.item_factor(s + ahead, i).data());
            for (uint32_t i : targets) __builtin_prefetch(p.item_factor(s + ahead, i).data());
        }
        for (size_t j = 0; j < count; ++j) {
            const auto w = p.item_factor(s, items[j]);
            for (uint32_t k = 0; k < K; ++k) by_rank[k * padded + j] = static_cast<double>(w[k]);
            item_norms[j] = norm_of_row(w.data());
        }
        for (size_t t = 0; t < targets.size(); ++t) target_norms[t] = norm_of_row(p.item_factor(s, targets[t]).data());
        for (size_t t = 0; t < targets.size(); ++t) {
            const uint32_t target = targets[t];
            const auto v = p.item_factor(s, target);
            for (size_t j0 = 0; j0 < padded; j0 += kBlock) {
                double acc[kBlock] = {};
                for (uint32_t k = 0; k < K; ++k) {
                    const double vk = static_cast<double>(v[k]);
                    const double* w = by_rank.data() + k * padded + j0;
                    for (size_t b = 0; b < kBlock; ++b) acc[b] += vk * w[b];
                }
                for (size_t b = 0; b < kBlock; ++b) dots[j0 + b] = acc[b];
            }
            double* row = total.data() + t * count;
            for (size_t j = 0; j < count; ++j) {
                if (items[j] == target) continue;
                const double denom = static_cast<double>(target_norms[t]) * item_norms[j];
                if (!(denom > 0.0)) continue;  // a zero factor has no direction: cosine 0, as in similar_items
                row[j] += dots[j] / denom;
            }
        }
    }
    std::vector<std::vector<SimilarItem>> out(targets.size());
    std::vector<size_t> order;
    for (size_t t = 0; t < targets.size(); ++t) {
        const double* row = total.data() + t * count;
        order.clear();
        for (size_t j = 0; j < count; ++j)
            if (items[j] != targets[t]) order.push_back(j);  // the target itself is skipped
        const size_t take = std::min<size_t>(n, order.size());
        // items is ascending, so ties in total break by item index through the position.
        std::partial_sort(order.begin(), order.begin() + static_cast<std::ptrdiff_t>(take), order.end(),
                          [&](size_t a, size_t b) { return row[a] != row[b] ? row[a] > row[b] : a < b; });
        out[t].reserve(take);
        for (size_t k = 0; k < take; ++k) out[t].push_back({items[order[k]], row[order[k]] / S});
    }
    return out;
}

std::vector<SimilarItem> most_similar_among(const Posterior& p, const ItemStatistics& statistics, uint32_t target,
                                            std::span<const uint32_t> among, uint32_t n) {
    const uint32_t targets[] = {target};
    return std::move(most_similar_among_each(p, statistics, targets, among, n).front());
}

}  // namespace credence
