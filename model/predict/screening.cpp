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

namespace credence {

namespace {

constexpr double kFloatUnit = 0x1.0p-24;

// Items per tile: one sample's slice is kTileItems * K floats (16 KiB at K = 16).
constexpr uint32_t kTileItems = 256;

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

// Four float lanes (GCC/Clang vector extension: SIMD on any target, no
// target-specific intrinsics).
typedef float Lanes4 __attribute__((vector_size(16)));

inline Lanes4 load4(const float* x) {
    Lanes4 v;
    std::memcpy(&v, x, sizeof v);
    return v;
}

// Float dot product in a fixed order: four partial sums, then a pairwise add.
inline float dot_float(const float* a, const float* b, uint32_t K) {
    Lanes4 acc = {0.0f, 0.0f, 0.0f, 0.0f};
    uint32_t k = 0;
    for (; k + 4 <= K; k += 4) acc += load4(a + k) * load4(b + k);
    float tail = 0.0f;
    for (; k < K; ++k) tail += a[k] * b[k];
    return ((acc[0] + acc[1]) + (acc[2] + acc[3])) + tail;
}

double job_dot_slack(const Posterior& p, std::span<const double> max_item_norm, const Viewer& v) {
    double dot = 0.0;
    for (uint32_t s = 0; s < p.num_samples; ++s)
        dot = std::max(dot, dot_slack(p.rank, norm_of(v.factor(s), p.rank), max_item_norm[s]));
    return dot;
}

void reset(ScreenJob& job, size_t count) {
    job.sum.assign(count, 0.0);
    job.magnitude.assign(count, 0.0);
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

// dots[j] = dot_float(vectors + j * K, u, K) for j < count, four items at a
// time (same summation order, so the same bits). KK > 0 fixes K at compile
// time so the inner loop unrolls; KK == 0 reads it at run time.
template <uint32_t KK>
void dot_many_k(const float* vectors, const float* u, uint32_t K, size_t count, float* dots) {
    if constexpr (KK > 0) K = KK;
    size_t j = 0;
    if (K % 4 == 0) {
        for (; j + 4 <= count; j += 4) {
            const float* v = vectors + j * K;
            Lanes4 a0 = {0, 0, 0, 0}, a1 = a0, a2 = a0, a3 = a0;
            for (uint32_t k = 0; k < K; k += 4) {
                const Lanes4 uk = load4(u + k);
                a0 += load4(v + k) * uk;
                a1 += load4(v + K + k) * uk;
                a2 += load4(v + 2 * K + k) * uk;
                a3 += load4(v + 3 * K + k) * uk;
            }
            // Lane q ends as (a_q[0] + a_q[1]) + (a_q[2] + a_q[3]).
            const Lanes4 s01 = __builtin_shufflevector(a0, a1, 0, 4, 2, 6) + __builtin_shufflevector(a0, a1, 1, 5, 3, 7);
            const Lanes4 s23 = __builtin_shufflevector(a2, a3, 0, 4, 2, 6) + __builtin_shufflevector(a2, a3, 1, 5, 3, 7);
            const Lanes4 r = __builtin_shufflevector(s01, s23, 0, 1, 4, 5) + __builtin_shufflevector(s01, s23, 2, 3, 6, 7);
            std::memcpy(dots + j, &r, sizeof r);
        }
    }
    for (; j < count; ++j) dots[j] = dot_float(vectors + j * K, u, K);
}

void dot_many(const float* vectors, const float* u, uint32_t K, size_t count, float* dots) {
    switch (K) {
        case 8: return dot_many_k<8>(vectors, u, K, count, dots);
        case 16: return dot_many_k<16>(vectors, u, K, count, dots);
        case 32: return dot_many_k<32>(vectors, u, K, count, dots);
        default: return dot_many_k<0>(vectors, u, K, count, dots);
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

// Samples per float group on the mean-only path: each item's lanes sum
// kGroupSamples * K products before they are flushed to double.
constexpr uint32_t kGroupSamples = 8;

// lanes[j] = the four partial sums of sum_{s0 <= s < s1} V_j,s . u_s for
// the `len` items from i0 (K a multiple of four).
template <uint32_t KK>
void group_dots_k(const Posterior& p, uint32_t i0, uint32_t len, uint32_t s0, uint32_t s1, const Viewer& v,
                  Lanes4* lanes) {
    const uint32_t K = KK > 0 ? KK : p.rank;
    for (uint32_t j = 0; j < len; ++j) lanes[j] = Lanes4{0, 0, 0, 0};
    for (uint32_t s = s0; s < s1; ++s) {
        const float* slice = p.item_block(s) + static_cast<size_t>(i0) * K;
        const float* u = v.factor(s);
        for (uint32_t j = 0; j < len; ++j) {
            const float* x = slice + static_cast<size_t>(j) * K;
            Lanes4 t = load4(x) * load4(u);
            for (uint32_t k = 4; k < K; k += 4) t += load4(x + k) * load4(u + k);
            lanes[j] += t;
        }
    }
}

#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
// The same sums eight lanes wide with fused multiply-adds, for CPUs that
// have them (checked at run time; the binary stays portable x86-64). The
// eight lanes fold to four with one more float add per lane.
typedef float Lanes8 __attribute__((vector_size(32)));

__attribute__((target("avx2,fma"))) void group_dots_wide(const Posterior& p, uint32_t i0, uint32_t len, uint32_t s0,
                                                          uint32_t s1, const Viewer& v, Lanes4* lanes) {
    const uint32_t K = p.rank;  // a multiple of 8
    Lanes8 wide[kTileItems];
    for (uint32_t j = 0; j < len; ++j) wide[j] = Lanes8{0, 0, 0, 0, 0, 0, 0, 0};
    for (uint32_t s = s0; s < s1; ++s) {
        const float* slice = p.item_block(s) + static_cast<size_t>(i0) * K;
        const float* u = v.factor(s);
        if (K == 16) {
            Lanes8 u0, u1;
            std::memcpy(&u0, u, sizeof u0);
            std::memcpy(&u1, u + 8, sizeof u1);
            for (uint32_t j = 0; j < len; ++j) {
                Lanes8 x0, x1;
                std::memcpy(&x0, slice + j * 16, sizeof x0);
                std::memcpy(&x1, slice + j * 16 + 8, sizeof x1);
                wide[j] += x0 * u0 + x1 * u1;
            }
        } else {
            for (uint32_t j = 0; j < len; ++j) {
                const float* x = slice + static_cast<size_t>(j) * K;
                for (uint32_t k = 0; k < K; k += 8) {
                    Lanes8 xk, uk;
                    std::memcpy(&xk, x + k, sizeof xk);
                    std::memcpy(&uk, u + k, sizeof uk);
                    wide[j] += xk * uk;
                }
            }
        }
    }
    for (uint32_t j = 0; j < len; ++j)
        lanes[j] = __builtin_shufflevector(wide[j], wide[j], 0, 1, 2, 3) +
                   __builtin_shufflevector(wide[j], wide[j], 4, 5, 6, 7);
}

bool wide_lanes_available() {
    static const bool ok = __builtin_cpu_supports("avx2") && __builtin_cpu_supports("fma");
    return ok;
}
#else
void group_dots_wide(const Posterior&, uint32_t, uint32_t, uint32_t, uint32_t, const Viewer&, Lanes4*) {}
bool wide_lanes_available() { return false; }
#endif

void group_dots(const Posterior& p, uint32_t i0, uint32_t len, uint32_t s0, uint32_t s1, const Viewer& v,
                Lanes4* lanes) {
    if (p.rank % 8 == 0 && wide_lanes_available()) return group_dots_wide(p, i0, len, s0, s1, v, lanes);
    switch (p.rank) {
        case 8: return group_dots_k<8>(p, i0, len, s0, s1, v, lanes);
        case 16: return group_dots_k<16>(p, i0, len, s0, s1, v, lanes);
        case 32: return group_dots_k<32>(p, i0, len, s0, s1, v, lanes);
        default: return group_dots_k<0>(p, i0, len, s0, s1, v, lanes);
    }
}

// The slack of a grouped job, as a bound on |sum/S - reference mean|. A
// lane's sum over a group is a float sum of at most G * K products, so it
// is within gamma_n sum_s |u_s| |V_i,s| with n = G K + 1 (the wide path's
// fold adds one rounding; fused multiply-adds only remove some) (Higham,
// section 3.1, as above; doubled and widened as for single dots). The double sums add at most
// (number of terms) * 2^-53 * (sum of magnitudes), counted generously.
void grouped_slack(const Posterior& p, std::span<const double> max_item_norm, double largest_bias_abs,
                   ScreenJob& job) {
    const uint32_t S = p.num_samples, K = p.rank;
    const double n = static_cast<double>(kGroupSamples) * K + 1.0;
    const double gamma = n * kFloatUnit / (1.0 - n * kFloatUnit);
    double dots = 0.0, user_abs = 0.0;
    for (uint32_t s = 0; s < S; ++s) {
        dots += norm_of(job.viewer.factor(s), K) * max_item_norm[s];
        user_abs += std::abs(static_cast<double>(p.global_mean)) + std::abs(job.viewer.bias_of(s));
    }
    const double terms = 4.0 * S + 8.0;
    const double rounding = 2.0 * terms * 0x1.0p-53 * (user_abs + largest_bias_abs + 1.01 * dots);
    job.slack = (2.0 * gamma * dots * 1.001 + rounding) / S;
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

void screen_all_items(const Posterior& p, std::span<const double> max_item_norm, std::span<ScreenJob* const> jobs) {
    const uint32_t S = p.num_samples, K = p.rank, I = p.num_items;
    // Mean-only jobs take the grouped path (four float lanes per item over
    // kGroupSamples samples); the rest need every m_s.
    std::vector<ScreenJob*> grouped, per_sample;
    for (ScreenJob* job : jobs) (!job->quantiles() && K % 4 == 0 ? grouped : per_sample).push_back(job);
    for (ScreenJob* job : jobs) reset(*job, I);
    for (ScreenJob* job : grouped) {
        double user_part = 0.0;  // sum_s (g + b_u,s): the same for every item
        for (uint32_t s = 0; s < S; ++s) user_part += static_cast<double>(p.global_mean) + job->viewer.bias_of(s);
        std::fill(job->sum.begin(), job->sum.end(), user_part);
    }
    float dots[kTileItems];
    Lanes4 lanes[kTileItems];
    double bias_sum[kTileItems], bias_abs[kTileItems];
    double largest_bias_abs = 0.0;  // max_i sum_s |c_i,s|
    for (uint32_t i0 = 0; i0 < I; i0 += kTileItems) {
        const uint32_t len = std::min(kTileItems, I - i0);
        std::fill(bias_sum, bias_sum + len, 0.0);
        std::fill(bias_abs, bias_abs + len, 0.0);
        for (uint32_t s0 = 0; s0 < S; s0 += kGroupSamples) {
            const uint32_t s1 = std::min(S, s0 + kGroupSamples);
            for (uint32_t s = s0; s < s1; ++s) {
                const float* slice = p.item_block(s) + static_cast<size_t>(i0) * K;
                const float* bias = p.has_biases ? p.item_bias.data() + static_cast<size_t>(s) * I + i0 : nullptr;
                if (bias && !grouped.empty())
                    for (uint32_t j = 0; j < len; ++j) {
                        bias_sum[j] += static_cast<double>(bias[j]);
                        bias_abs[j] += std::abs(static_cast<double>(bias[j]));
                    }
                for (ScreenJob* job : per_sample) {
                    dot_many(slice, job->viewer.factor(s), K, len, dots);
                    const double off = static_cast<double>(p.global_mean) + job->viewer.bias_of(s);
                    accumulate(*job, i0, s, dots, bias, len, off);
                }
            }
            // The group's slices are still in cache.
            for (ScreenJob* job : grouped) {
                group_dots(p, i0, len, s0, s1, job->viewer, lanes);
                double* sum = job->sum.data() + i0;
                for (uint32_t j = 0; j < len; ++j)
                    sum[j] += (static_cast<double>(lanes[j][0]) + static_cast<double>(lanes[j][1])) +
                              (static_cast<double>(lanes[j][2]) + static_cast<double>(lanes[j][3]));
            }
        }
        for (ScreenJob* job : grouped) {
            double* sum = job->sum.data() + i0;
            for (uint32_t j = 0; j < len; ++j) sum[j] += bias_sum[j];
        }
        for (uint32_t j = 0; j < len; ++j) largest_bias_abs = std::max(largest_bias_abs, bias_abs[j]);
    }
    for (ScreenJob* job : per_sample) finish_slack(p, max_item_norm, *job);
    for (ScreenJob* job : grouped) grouped_slack(p, max_item_norm, largest_bias_abs, *job);
}

void screen_pool(const Posterior& p, std::span<const double> max_item_norm, const std::vector<uint32_t>& pool,
                 ScreenJob& job) {
    const uint32_t S = p.num_samples, K = p.rank;
    reset(job, pool.size());
    for (uint32_t s = 0; s < S; ++s) {
        const double off = static_cast<double>(p.global_mean) + job.viewer.bias_of(s);
        const float* u = job.viewer.factor(s);
        for (size_t j = 0; j < pool.size(); ++j) {
            const uint32_t item = pool[j];
            const float dot = dot_float(p.item_block(s) + static_cast<size_t>(item) * K, u, K);
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
    for (size_t j = 0; j < pool.size(); ++j)
        out[j] = offset(p, v, s, pool[j]) +
                 static_cast<double>(dot_float(p.item_block(s) + static_cast<size_t>(pool[j]) * K, u, K));
    return dot_slack(K, norm_of(u, K), max_item_norm[s]);
}

}  // namespace credence
