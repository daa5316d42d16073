// Exact top-n selection with pruning by score bounds. Internal to model/.
//
// Each candidate comes with a cheap interval [lo, hi] that is guaranteed to
// contain its exact score; the exact score is costly (a mixture quantile).
// The result equals sorting every candidate by exact score (descending, ties
// by lower item index) and keeping n, while evaluating the exact score only
// for candidates whose upper bound can still reach the top n:
//   1. T = the n-th largest lower bound: at least n candidates score >= T, so
//      a candidate with hi < T scores below n others and is dropped.
//   2. The rest are visited best guess first (by `estimate`, any heuristic),
//      so the n held exact scores soon approach the final ones. Once n are
//      held, a candidate whose hi is below the worst held score is skipped,
//      and so is one that a cheaper test (`below`) shows to be certainly below
//      it. A skipped candidate scores below n held ones, so below the final n.
#pragma once
#include <algorithm>
#include <cmath>
#include <cstddef>
#include <cstdint>
#include <vector>

namespace credence {

struct ScoreBound {
    uint32_t item = 0;
    double lo = 0.0;  // lo <= exact score <= hi
    double hi = 0.0;
    double estimate = 0.0;  // visiting order only; need not lie in [lo, hi]
};

struct ScoredItem {
    uint32_t item = 0;
    double score = 0.0;
};

// The ranking order: higher score first, then lower item index.
inline bool ranks_before(const ScoredItem& a, const ScoredItem& b) {
    return a.score > b.score || (a.score == b.score && a.item < b.item);
}

// Needs: n > 0; exact(item) returns the exact score, within [lo, hi] of that
// item's bound; below(item, t) returns true only if exact(item) < t. Returns
// min(n, bounds.size()) items in ranking order. `evaluated`, when given,
// receives how many exact scores were computed.
template <class ExactScore, class CertainlyBelow>
std::vector<ScoredItem> select_top_n(std::vector<ScoreBound> bounds, size_t n, ExactScore&& exact,
                                     CertainlyBelow&& below, size_t* evaluated = nullptr) {
    if (bounds.size() > n) {
        std::vector<double> lows(bounds.size());
        for (size_t j = 0; j < bounds.size(); ++j) lows[j] = bounds[j].lo;
        std::nth_element(lows.begin(), lows.begin() + static_cast<std::ptrdiff_t>(n - 1), lows.end(),
                         [](double a, double b) { return a > b; });
        const double threshold = lows[n - 1];
        std::erase_if(bounds, [threshold](const ScoreBound& b) { return b.hi < threshold; });
    }
    std::sort(bounds.begin(), bounds.end(), [](const ScoreBound& a, const ScoreBound& b) {
        return a.estimate > b.estimate || (a.estimate == b.estimate && a.item < b.item);
    });
    // Max-heap under ranks_before: the front is the worst item held.
    std::vector<ScoredItem> held;
    held.reserve(n + 1);
    size_t count = 0;
    for (const auto& b : bounds) {
        if (held.size() == n && (b.hi < held.front().score || below(b.item, held.front().score))) continue;
        const ScoredItem candidate{b.item, exact(b.item)};
        ++count;
        if (held.size() < n) {
            held.push_back(candidate);
            std::push_heap(held.begin(), held.end(), ranks_before);
        } else if (ranks_before(candidate, held.front())) {
            std::pop_heap(held.begin(), held.end(), ranks_before);
            held.back() = candidate;
            std::push_heap(held.begin(), held.end(), ranks_before);
        }
    }
    if (evaluated) *evaluated = count;
    std::sort(held.begin(), held.end(), ranks_before);
    return held;
}

template <class ExactScore>
std::vector<ScoredItem> select_top_n(std::vector<ScoreBound> bounds, size_t n, ExactScore&& exact,
                                     size_t* evaluated = nullptr) {
    return select_top_n(std::move(bounds), n, exact, [](uint32_t, double) { return false; }, evaluated);
}

}  // namespace credence
