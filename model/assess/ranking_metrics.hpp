// Top-k ranking quality of recommendation lists against held-out ratings:
// precision@k, recall@k, NDCG@k and catalogue coverage. Plain data in, so the
// evaluation command and tests can call it without a model.
//
// Definitions (per user, with R the number of relevant held-out items):
//   relevant     a held-out item whose rating is >= the relevance threshold.
//                Ranked items with no held-out rating count as not relevant
//                (the usual offline convention: unobserved is not a hit).
//   gain         GainKind::graded: the held-out rating itself if relevant,
//                else 0; GainKind::binary: 1 if relevant, else 0.
//   precision@k  relevant items among the first k ranked / k. A list shorter
//                than k is not padded: its missing slots count as misses.
//   recall@k     relevant items among the first k ranked / R.
//   NDCG@k       DCG@k / IDCG@k, DCG@k = sum_{i=1..k} gain_i / log2(i + 1)
//                (Jarvelin & Kekalainen 2002, "Cumulated gain-based evaluation
//                of IR techniques", ACM TOIS 20(4), with the log2(i + 1)
//                discount applied from rank 1); IDCG@k is the DCG of the
//                user's held-out gains sorted descending, first k.
// Averages are plain means over the users with R >= 1; users without a
// relevant held-out item are counted but not averaged (every metric above is
// undefined or trivially 0 for them).
// Catalogue coverage: distinct items in the first k of any user's list
// (every user, including those not averaged) / num_items.
#pragma once
#include <cstdint>
#include <span>
#include <unordered_map>
#include <vector>

namespace credence {

enum class GainKind { graded, binary };

// Held-out ratings of one user: item index -> rating.
using HeldOutRatings = std::unordered_map<uint32_t, double>;

struct UserRankingScores {
    uint32_t relevant = 0;  // R
    uint32_t hits = 0;      // relevant items in the first k
    double precision = 0.0;
    double recall = 0.0;    // NaN when R = 0
    double ndcg = 0.0;      // NaN when R = 0
};

struct RankingMetrics {
    uint32_t k = 0;
    double relevance_threshold = 0.0;
    GainKind gain = GainKind::graded;
    double precision_at_k = 0.0;  // means over evaluated users; NaN when none
    double recall_at_k = 0.0;
    double ndcg_at_k = 0.0;
    double catalogue_coverage = 0.0;
    uint64_t users_evaluated = 0;        // users with R >= 1
    uint64_t users_without_relevant = 0;
    uint64_t distinct_items_recommended = 0;
};

// One user. Needs k >= 1, a finite threshold, a ranking without repeated
// items among its first k, finite held-out ratings. Throws
// std::invalid_argument otherwise: evaluate() checks k and the threshold
// before ranking, so a failure here is a bug in the caller.
UserRankingScores score_user(std::span<const uint32_t> ranked, const HeldOutRatings& held_out, uint32_t k,
                             double relevance_threshold, GainKind gain = GainKind::graded);

// All users: ranked_by_user[u] and held_out_by_user[u] belong to the same user.
// Needs equal list counts, num_items >= 1 and every item index < num_items,
// plus score_user's needs. Throws std::invalid_argument naming the user
// otherwise (a bug in the caller).
RankingMetrics ranking_metrics(const std::vector<std::vector<uint32_t>>& ranked_by_user,
                               const std::vector<HeldOutRatings>& held_out_by_user, uint32_t num_items,
                               uint32_t k, double relevance_threshold, GainKind gain = GainKind::graded);

}  // namespace credence
