#include "model/assess/ranking_metrics.hpp"

#include <algorithm>
#include <cmath>
#include <functional>
#include <limits>
#include <stdexcept>
#include <string>
#include <unordered_set>

#include <fmt/format.h>

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

double gain_of(double rating, double threshold, GainKind kind) {
    if (rating < threshold) return 0.0;
    return kind == GainKind::graded ? rating : 1.0;
}

}  // namespace

UserRankingScores score_user(std::span<const uint32_t> ranked, const HeldOutRatings& held_out, uint32_t k,
                             double relevance_threshold, GainKind gain) {
    if (k == 0) throw std::invalid_argument("ranking metrics: k must be at least 1");
    if (!std::isfinite(relevance_threshold))
        throw std::invalid_argument("ranking metrics: the relevance threshold must be a finite rating");

    UserRankingScores out;
    std::vector<double> gains;  // held-out gains, for the ideal ordering
    for (const auto& [item, rating] : held_out) {
        if (!std::isfinite(rating))
            throw std::invalid_argument(fmt::format("ranking metrics: held-out rating of item {} is not finite", item));
        if (rating >= relevance_threshold) {
            ++out.relevant;
            gains.push_back(gain_of(rating, relevance_threshold, gain));
        }
    }

    const size_t depth = std::min<size_t>(k, ranked.size());
    std::unordered_set<uint32_t> seen;
    double dcg = 0.0;
    for (size_t i = 0; i < depth; ++i) {
        if (!seen.insert(ranked[i]).second)
            throw std::invalid_argument(fmt::format("ranking metrics: item {} appears twice in one ranked list", ranked[i]));
        const auto it = held_out.find(ranked[i]);
        if (it == held_out.end() || it->second < relevance_threshold) continue;
        ++out.hits;
        dcg += gain_of(it->second, relevance_threshold, gain) / std::log2(static_cast<double>(i) + 2.0);
    }
    out.precision = static_cast<double>(out.hits) / k;
    if (out.relevant == 0) {
        out.recall = out.ndcg = kNaN;
        return out;
    }
    out.recall = static_cast<double>(out.hits) / out.relevant;
    std::sort(gains.begin(), gains.end(), std::greater<>());
    double ideal = 0.0;
    for (size_t i = 0; i < std::min<size_t>(k, gains.size()); ++i)
        ideal += gains[i] / std::log2(static_cast<double>(i) + 2.0);
    // ideal > 0 unless every relevant gain is 0 (graded gains with a rating of
    // 0 at a threshold <= 0); then no ordering can gain anything.
    out.ndcg = ideal > 0.0 ? dcg / ideal : kNaN;
    return out;
}

RankingMetrics ranking_metrics(const std::vector<std::vector<uint32_t>>& ranked_by_user,
                               const std::vector<HeldOutRatings>& held_out_by_user, uint32_t num_items,
                               uint32_t k, double relevance_threshold, GainKind gain) {
    if (ranked_by_user.size() != held_out_by_user.size())
        throw std::invalid_argument(fmt::format("ranking metrics: {} ranked lists but {} held-out sets; give one of each per user",
                                    ranked_by_user.size(), held_out_by_user.size()));
    if (num_items == 0) throw std::invalid_argument("ranking metrics: the catalogue has no items");
    if (k == 0) throw std::invalid_argument("ranking metrics: k must be at least 1");

    RankingMetrics out;
    out.k = k;
    out.relevance_threshold = relevance_threshold;
    out.gain = gain;
    std::vector<char> recommended(num_items, 0);
    double sum_precision = 0.0, sum_recall = 0.0, sum_ndcg = 0.0;
    uint64_t ndcg_users = 0;
    for (size_t u = 0; u < ranked_by_user.size(); ++u) {
        const auto& ranked = ranked_by_user[u];
        for (uint32_t item : ranked)
            if (item >= num_items)
                throw std::invalid_argument(fmt::format("ranking metrics: user {} is recommended item {} beyond the {} catalogue items",
                                            u, item, num_items));
        for (const auto& entry : held_out_by_user[u])
            if (entry.first >= num_items)
                throw std::invalid_argument(fmt::format("ranking metrics: user {} has held-out item {} beyond the {} catalogue items",
                                            u, entry.first, num_items));
        const auto scores = score_user(ranked, held_out_by_user[u], k, relevance_threshold, gain);
        for (size_t i = 0; i < std::min<size_t>(k, ranked.size()); ++i) recommended[ranked[i]] = 1;
        if (scores.relevant == 0) {
            ++out.users_without_relevant;
            continue;
        }
        ++out.users_evaluated;
        sum_precision += scores.precision;
        sum_recall += scores.recall;
        if (!std::isnan(scores.ndcg)) {
            sum_ndcg += scores.ndcg;
            ++ndcg_users;
        }
    }
    const double n = static_cast<double>(out.users_evaluated);
    out.precision_at_k = out.users_evaluated ? sum_precision / n : kNaN;
    out.recall_at_k = out.users_evaluated ? sum_recall / n : kNaN;
    out.ndcg_at_k = ndcg_users ? sum_ndcg / static_cast<double>(ndcg_users) : kNaN;
    out.distinct_items_recommended = static_cast<uint64_t>(std::count(recommended.begin(), recommended.end(), 1));
    out.catalogue_coverage = static_cast<double>(out.distinct_items_recommended) / num_items;
    return out;
}

}  // namespace credence
