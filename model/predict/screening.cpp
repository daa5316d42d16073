// Screening and reference per-sample means (model/predict/screening.hpp).
//
// Rounding bound: a float dot product of length K, in any summation order,
// satisfies |fl(a.b) - a.b| <= gamma_K sum|a_k b_k| <= gamma_K |a| |b| with
// gamma_K = K u / (1 - K u), u = 2^-24 (Higham, Accuracy and Stability of
// Numerical Algorithms, 2nd ed., section 3.1). The bound is doubled to cover
// the double-precision reference and the norms' own rounding. Storing a
// screened mean as float adds at most u |m|, and the double sums over at
// most a few million terms far less; 2 u (1 + max |m|) covers both.
//
// The all-items pass walks the catalogue in tiles of items; for each tile it
// reads every sample's slice of the item block once and scores it for every
// job while the slice is in L1, so the item samples stream from memory once
// per pass however many viewers share it. Summaries live in item-indexed
// double arrays; a tile's part of them stays in cache across samples.
#include "model/predict/screening.hpp"

#include <algorithm>
#include <cmath>
#include <cstring>
#include <limits>
#include <stdexcept>

#include "model/math/cpu_level.hpp"
#include "model/math/half_float.hpp"
#include "model/posterior/huge_pages.hpp"
#include "model/predict/screening_kernels.hpp"

namespace credence {

namespace {

constexpr double kFloatUnit = 0x1.0p-24;

// Items per tile: one sample's slice is kTileItems * K floats (16 KiB at K = 16).
constexpr uint32_t kTileItems = screening_kernels::kTileItems;

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

// The active level's float kernels (model/predict/screening_kernels.hpp).
const screening_kernels::Table& kernels() { return screening_kernels::table_for(active_cpu_level()); }

double job_dot_slack(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v) {
    double dot = 0.0;
    for (uint32_t s = 0; s < p.num_samples; ++s)
        dot = std::max(dot, dot_slack(p.rank, norm_of(v.factor(s), p.rank), max_item_norm[s]));
    return dot;
}

// Sizes a job's summaries for `count` items; `magnitude` only where the
// per-sample slack needs it (the grouped path's slack does not).
void reset(ScreenJob& job, size_t count, bool magnitude = true) {
    job.sum.assign(count, 0.0);
    if (magnitude) job.magnitude.assign(count, 0.0);
    else job.magnitude.clear();
    if (job.quantiles()) {
        job.sum_sq.assign(count, 0.0);
        job.lo.assign(count, std::numeric_limits<double>::infinity());
        job.hi.assign(count, -std::numeric_limits<double>::infinity());
        job.rows.resize(count * job.shift.size());  // every entry is written by the pass
    } else {
        job.rows.clear();
        job.sum_sq.clear();
        job.lo.clear();
        job.hi.clear();
    }
}

// Adds sample s's screened means m_j = off + bias[j] + dots[j] of `count`
// items to a job's summaries, starting at item `first` (bias null: none).
void accumulate(ScreenJob& job, size_t first, uint32_t s, const float* dots, const float* bias, size_t count,
                double off) {
    double* sum = job.sum.data() + first;
    double* magnitude = job.magnitude.data() + first;
    if (job.quantiles()) {
        double* sum_sq = job.sum_sq.data() + first;
        double* lo = job.lo.data() + first;
        double* hi = job.hi.data() + first;
        const size_t S = job.shift.size();
        float* row = job.rows.data() + first * S + s;
        const double shift = job.shift[s];
        for (size_t j = 0; j < count; ++j) {
            const double m = (off + (bias ? static_cast<double>(bias[j]) : 0.0)) + static_cast<double>(dots[j]);
            sum[j] += m;
            sum_sq[j] += m * m;
            lo[j] = std::min(lo[j], m + shift);
            hi[j] = std::max(hi[j], m + shift);
            magnitude[j] = std::max(magnitude[j], std::abs(m));
            row[j * S] = static_cast<float>(m);
        }
    } else if (bias) {
        for (size_t j = 0; j < count; ++j) {
            const double m = (off + static_cast<double>(bias[j])) + static_cast<double>(dots[j]);
            sum[j] += m;
            magnitude[j] = std::max(magnitude[j], std::abs(m));
        }
    } else {
        for (size_t j = 0; j < count; ++j) {
            const double m = off + static_cast<double>(dots[j]);
            sum[j] += m;
            magnitude[j] = std::max(magnitude[j], std::abs(m));
        }
    }
}

void finish_slack(const Posterior& p, std::span<const double> max_item_norm, ScreenJob& job) {
    double largest = 0.0;
    for (double m : job.magnitude) largest = std::max(largest, m);
    job.slack = job_dot_slack(p, max_item_norm, job.viewer) + 2.0 * kFloatUnit * (1.0 + largest);
}

constexpr uint32_t kGroupSamples = screening_kernels::kGroupSamples;

// The slack of a grouped job, as a bound on |sum/S - reference mean|. A
// group's flushed value is a float sum of at most G * K products in some
// order (model/predict/screening_kernels.hpp), so it is within gamma_n
// sum_s |u_s| |V_i,s| with n = G K + 1 (one to spare; fused multiply-adds
// only remove roundings) (Higham, section 3.1, as above; doubled and
// widened as for single dots). The double sums add at most
// (number of terms) * 2^-53 * (sum of magnitudes), counted generously.
// A pass over the half copy (`residual_norm` non-empty) scores h = half(V)
// instead of V: |u.h - u.V| <= |u| |h - V| <= |u| residual_s (Cauchy-Schwarz)
// is added, and the float rounding is bounded with |h| <= |V| + residual_s.
void grouped_slack(const Posterior& p, std::span<const double> max_item_norm, double largest_bias_abs,
                   std::span<const double> residual_norm, ScreenJob& job) {
    const uint32_t S = p.num_samples, K = p.rank;
    const double n = static_cast<double>(kGroupSamples) * K + 1.0;
    const double gamma = n * kFloatUnit / (1.0 - n * kFloatUnit);
    double dots = 0.0, halving = 0.0, user_abs = 0.0;
    for (uint32_t s = 0; s < S; ++s) {
        const double user_norm = norm_of(job.viewer.factor(s), K);
        const double residual = residual_norm.empty() ? 0.0 : residual_norm[s];
        dots += user_norm * (max_item_norm[s] + residual);
        halving += user_norm * residual;
        user_abs += std::abs(static_cast<double>(p.global_mean)) + std::abs(job.viewer.bias_of(s));
    }
    const double terms = 4.0 * S + 8.0;
    const double rounding = 2.0 * terms * 0x1.0p-53 * (user_abs + largest_bias_abs + 1.01 * dots);
    job.slack = (2.0 * gamma * dots * 1.001 + halving * 1.001 + rounding) / S;
}

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
    // Each sample's rows sit in another block: ask for those a few samples
    // ahead, so their memory latencies overlap instead of adding up (the
    // values are the same).
    constexpr uint32_t kAhead = 8;
    const uint32_t S = p.num_samples;
    auto prefetch = [&](uint32_t s) {
        __builtin_prefetch(p.item_block(s) + static_cast<size_t>(item) * p.rank);
        __builtin_prefetch(v.factor(s));
        if (p.has_biases) __builtin_prefetch(p.item_bias.data() + static_cast<size_t>(s) * p.num_items + item);
        if (v.bias) __builtin_prefetch(v.bias + static_cast<size_t>(s) * v.bias_stride);
    };
    for (uint32_t s = 0; s < std::min(kAhead, S); ++s) prefetch(s);
    out.resize(S);
    for (uint32_t s = 0; s < S; ++s) {
        if (s + kAhead < S) prefetch(s + kAhead);
        out[s] = reference_mean(p, v, s, item);
    }
}

std::vector<double> max_item_norms(const Posterior& p) {
    std::vector<double> out(p.num_samples, 0.0);
    for (uint32_t s = 0; s < p.num_samples; ++s)
        for (uint32_t i = 0; i < p.num_items; ++i)
            out[s] = std::max(out[s], norm_of(p.item_factor(s, i).data(), p.rank));
    return out;
}

ItemBiasTotals item_bias_totals(const Posterior& p) {
    ItemBiasTotals out;
    if (!p.has_biases) return out;
    const uint32_t S = p.num_samples, I = p.num_items;
    out.sum.assign(I, 0.0);
    std::vector<double> abs_sum(I, 0.0);
    for (uint32_t s = 0; s < S; ++s) {
        const float* bias = p.item_bias.data() + static_cast<size_t>(s) * I;
        for (uint32_t i = 0; i < I; ++i) {
            out.sum[i] += static_cast<double>(bias[i]);
            abs_sum[i] += std::abs(static_cast<double>(bias[i]));
        }
    }
    for (double a : abs_sum) out.largest_abs_sum = std::max(out.largest_abs_sum, a);
    return out;
}

HalfItemBlocks half_item_blocks(const Posterior& p) {
    HalfItemBlocks out;
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    const size_t per_sample = static_cast<size_t>(I) * K;
    if (per_sample == 0 || S == 0) return out;
    for (uint32_t s = 0; s < S; ++s) {
        const float* block = p.item_block(s);
        for (size_t j = 0; j < per_sample; ++j)
            if (!(std::abs(block[j]) <= kLargestHalf)) return out;  // also NaN
    }
    // Huge pages where the system grants them, as for the posterior's own
    // arrays: a pass reads a few KiB from each sample's block.
    size_for_reading(out.values, per_sample * S);
    out.residual_norm.assign(S, 0.0);
    for (uint32_t s = 0; s < S; ++s) {
        const float* block = p.item_block(s);
        uint16_t* halves = out.values.data() + per_sample * s;
        for (uint32_t i = 0; i < I; ++i) {
            double squares = 0.0;
            for (uint32_t k = 0; k < K; ++k) {
                const size_t j = static_cast<size_t>(i) * K + k;
                halves[j] = half_from_float(block[j]);
                const double r = static_cast<double>(block[j]) - static_cast<double>(float_from_half(halves[j]));
                squares += r * r;
            }
            // Rounded up a little: the sum of squares and the root round too.
            out.residual_norm[s] = std::max(out.residual_norm[s], std::sqrt(squares) * (1.0 + 1e-12));
        }
    }
    return out;
}

void screen_all_items(const Posterior& p, std::span<const double> max_item_norm, std::span<ScreenJob* const> jobs,
                      int threads, const ItemBiasTotals* bias_totals, const HalfItemBlocks* half) {
    const uint32_t S = p.num_samples, K = p.rank, I = p.num_items;
    // Mean-only jobs take the grouped path (float sums over kGroupSamples
    // samples); the rest need every m_s.
    std::vector<ScreenJob*> grouped, per_sample;
    for (ScreenJob* job : jobs) (!job->quantiles() ? grouped : per_sample).push_back(job);
    for (ScreenJob* job : per_sample) reset(*job, I);
    for (ScreenJob* job : grouped) reset(*job, I, false);
    for (ScreenJob* job : grouped) {
        double user_part = 0.0;  // sum_s (g + b_u,s): the same for every item
        for (uint32_t s = 0; s < S; ++s) user_part += static_cast<double>(p.global_mean) + job->viewer.bias_of(s);
        std::fill(job->sum.begin(), job->sum.end(), user_part);
    }
    const screening_kernels::Table& k = kernels();
    double largest_bias_abs = 0.0;  // max_i sum_s |c_i,s|
    // With the totals at hand, only per-sample jobs need the bias block.
    const bool totals = bias_totals != nullptr && p.has_biases;
    if (totals && bias_totals->sum.size() != I)
        throw std::invalid_argument("screen_all_items: bias totals of another posterior");
    const bool read_bias = p.has_biases && (!totals || !per_sample.empty());
    // Mean-only passes read the half copy when there is one (per-sample jobs
    // need the floats, so a mixed pass reads those for everyone).
    const bool halves = half != nullptr && half->usable() && per_sample.empty() &&
                        k.reads_halves(static_cast<uint32_t>(grouped.size()), K);
    if (halves && half->values.size() != static_cast<size_t>(S) * I * K)
        throw std::invalid_argument("screen_all_items: half copy of another posterior");
    const auto tiles = static_cast<int64_t>((I + kTileItems - 1) / kTileItems);
    const int team = threads > 1 && tiles > 1 ? threads : 1;
    // Tiles are independent (each writes only its items' summaries), so the
    // result is the same for any team. Handed out two at a time: a thread
    // that gets less of the CPU (a busy machine) takes fewer.
#pragma omp parallel num_threads(team) reduction(max : largest_bias_abs)
    {
        float dots[kTileItems];
        double bias_sum[kTileItems], bias_abs[kTileItems];
        // The grouped jobs' viewer factors ([job][g]) and summary rows, per tile and group.
        std::vector<const float*> viewers(grouped.size() * kGroupSamples);
        std::vector<double*> sums(grouped.size());
        const float* slices[kGroupSamples];
        const uint16_t* half_slices[kGroupSamples];
#pragma omp for schedule(dynamic, 2)
        for (int64_t tile_index = 0; tile_index < tiles; ++tile_index) {
            const uint32_t i0 = static_cast<uint32_t>(tile_index) * kTileItems;
            const uint32_t len = std::min(kTileItems, I - i0);
            std::fill(bias_sum, bias_sum + len, 0.0);
            std::fill(bias_abs, bias_abs + len, 0.0);
            for (size_t b = 0; b < grouped.size(); ++b) sums[b] = grouped[b]->sum.data() + i0;
            for (uint32_t s0 = 0; s0 < S; s0 += kGroupSamples) {
                const uint32_t s1 = std::min(S, s0 + kGroupSamples);
                for (uint32_t s = s0; s < s1; ++s) {
                    const float* slice = p.item_block(s) + static_cast<size_t>(i0) * K;
                    slices[s - s0] = slice;
                    if (halves) half_slices[s - s0] = half->values.data() + (static_cast<size_t>(s) * I + i0) * K;
                    const float* bias = read_bias ? p.item_bias.data() + static_cast<size_t>(s) * I + i0 : nullptr;
                    if (bias && !totals && !grouped.empty())
                        for (uint32_t j = 0; j < len; ++j) {
                            bias_sum[j] += static_cast<double>(bias[j]);
                            bias_abs[j] += std::abs(static_cast<double>(bias[j]));
                        }
                    for (ScreenJob* job : per_sample) {
                        k.dots(slice, job->viewer.factor(s), K, len, dots);
                        const double off = static_cast<double>(p.global_mean) + job->viewer.bias_of(s);
                        accumulate(*job, i0, s, dots, bias, len, off);
                    }
                }
                // The group's slices are still in cache: one small matrix product
                // per sample for every grouped viewer at once.
                if (!grouped.empty()) {
                    const uint32_t G = s1 - s0;
                    for (size_t b = 0; b < grouped.size(); ++b)
                        for (uint32_t g = 0; g < G; ++g) viewers[b * G + g] = grouped[b]->viewer.factor(s0 + g);
                    screening_kernels::GroupedTile tile;
                    tile.slices = slices;
                    tile.viewers = viewers.data();
                    tile.samples = G;
                    tile.items = len;
                    tile.rank = K;
                    tile.count = static_cast<uint32_t>(grouped.size());
                    tile.half_slices = halves ? half_slices : nullptr;
                    k.grouped_sums(tile, sums.data());
                }
            }
            // The same sums, from the totals or from this tile's reading.
            const double* item_bias_sum = totals ? bias_totals->sum.data() + i0 : bias_sum;
            for (ScreenJob* job : grouped) {
                double* sum = job->sum.data() + i0;
                for (uint32_t j = 0; j < len; ++j) sum[j] += item_bias_sum[j];
            }
            if (!totals)
                for (uint32_t j = 0; j < len; ++j) largest_bias_abs = std::max(largest_bias_abs, bias_abs[j]);
        }
    }
    if (totals) largest_bias_abs = bias_totals->largest_abs_sum;
    for (ScreenJob* job : per_sample) finish_slack(p, max_item_norm, *job);
    const std::span<const double> residual_norm = halves ? std::span<const double>(half->residual_norm)
                                                         : std::span<const double>();
    for (ScreenJob* job : grouped) grouped_slack(p, max_item_norm, largest_bias_abs, residual_norm, *job);
}

void screen_pool(const Posterior& p, std::span<const double> max_item_norm, const std::vector<uint32_t>& pool,
                 ScreenJob& job) {
    const uint32_t S = p.num_samples, K = p.rank;
    const screening_kernels::Table& k = kernels();
    reset(job, pool.size());
    for (uint32_t s = 0; s < S; ++s) {
        const double off = static_cast<double>(p.global_mean) + job.viewer.bias_of(s);
        const float* u = job.viewer.factor(s);
        for (size_t j = 0; j < pool.size(); ++j) {
            const uint32_t item = pool[j];
            float dot;
            k.dots(p.item_block(s) + static_cast<size_t>(item) * K, u, K, 1, &dot);
            const float* bias = p.has_biases ? p.item_bias.data() + static_cast<size_t>(s) * p.num_items + item : nullptr;
            accumulate(job, j, s, &dot, bias, 1, off);
        }
    }
    finish_slack(p, max_item_norm, job);
}

double screen_one_sample(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v,
                         const std::vector<uint32_t>& pool, uint32_t s, std::vector<double>& out) {
    const uint32_t K = p.rank;
    out.resize(pool.size());
    const float* u = v.factor(s);
    const screening_kernels::Table& k = kernels();
    for (size_t j = 0; j < pool.size(); ++j) {
        float dot;
        k.dots(p.item_block(s) + static_cast<size_t>(pool[j]) * K, u, K, 1, &dot);
        out[j] = offset(p, v, s, pool[j]) + static_cast<double>(dot);
    }
    return dot_slack(K, norm_of(u, K), max_item_norm[s]);
}

}  // namespace credence
