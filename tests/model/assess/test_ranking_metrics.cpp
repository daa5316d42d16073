// Tests for model/ranking_metrics on a worked example computed by hand.
// Scenario: an invented shop with 10 catalogue items (indices 0-9) and three
// customers; ratings on a 1-5 scale, relevance threshold 4.
#include <catch2/catch.hpp>

#include <cmath>
#include <stdexcept>
#include <vector>

#include "model/assess/ranking_metrics.hpp"

using namespace credence;

namespace {

// Customer A: ranked [3, 1, 7, 0, 5]; held out {1: 5, 7: 3, 5: 4, 2: 4.5}.
//   Relevant (rating >= 4): items 1, 5, 2 -> R = 3 (item 7 at 3 is not).
// Customer B: ranked [2, 6, 4, 1, 0]; held out {2: 4, 0: 5} -> R = 2.
// Customer C: ranked [5, 6, 7, 3, 8]; held out {6: 2} -> R = 0, not averaged.
const std::vector<std::vector<uint32_t>> kRanked = {{3, 1, 7, 0, 5}, {2, 6, 4, 1, 0}, {5, 6, 7, 3, 8}};
const std::vector<HeldOutRatings> kHeldOut = {{{1, 5.0}, {7, 3.0}, {5, 4.0}, {2, 4.5}},
                                              {{2, 4.0}, {0, 5.0}},
                                              {{6, 2.0}}};
constexpr uint32_t kItems = 10;

}  // namespace

TEST_CASE("worked example at k = 5 with graded gains") {
    // log2(2) = 1, log2(3) = 1.5849625, log2(4) = 2, log2(6) = 2.5849625.
    // A: hits at ranks 2 (item 1, gain 5) and 5 (item 5, gain 4).
    //    precision 2/5 = 0.4, recall 2/3.
    //    DCG = 5/log2(3) + 4/log2(6) = 3.1546488 + 1.5474112 = 4.7020600
    //    IDCG = gains 5, 4.5, 4: 5/1 + 4.5/log2(3) + 4/log2(4) = 5 + 2.8391839 + 2 = 9.8391839
    //    NDCG = 4.7020600 / 9.8391839 = 0.4778913
    // B: hits at ranks 1 (item 2, gain 4) and 5 (item 0, gain 5).
    //    precision 0.4, recall 2/2 = 1.
    //    DCG = 4/1 + 5/log2(6) = 4 + 1.9342640 = 5.9342640
    //    IDCG = gains 5, 4: 5 + 4/log2(3) = 5 + 2.5237190 = 7.5237190
    //    NDCG = 5.9342640 / 7.5237190 = 0.7887408
    // Means over A and B (C has no relevant item):
    //    precision 0.4, recall (2/3 + 1)/2 = 0.8333333, NDCG (0.4778913 + 0.7887408)/2 = 0.6333160
    // Coverage: A {3,1,7,0,5} u B {2,6,4,1,0} u C {5,6,7,3,8} = {0,...,8}: 9 of 10.
    const auto a = score_user(kRanked[0], kHeldOut[0], 5, 4.0);
    CHECK(a.relevant == 3);
    CHECK(a.hits == 2);
    CHECK(a.precision == Approx(0.4));
    CHECK(a.recall == Approx(2.0 / 3.0));
    CHECK(a.ndcg == Approx(0.4778913).epsilon(1e-6));
    const auto b = score_user(kRanked[1], kHeldOut[1], 5, 4.0);
    CHECK(b.ndcg == Approx(0.7887408).epsilon(1e-6));
    CHECK(b.recall == Approx(1.0));

    const auto m = ranking_metrics(kRanked, kHeldOut, kItems, 5, 4.0);
    CHECK(m.users_evaluated == 2);
    CHECK(m.users_without_relevant == 1);
    CHECK(m.precision_at_k == Approx(0.4));
    CHECK(m.recall_at_k == Approx(0.8333333).epsilon(1e-6));
    CHECK(m.ndcg_at_k == Approx(0.6333160).epsilon(1e-6));
    CHECK(m.distinct_items_recommended == 9);
    CHECK(m.catalogue_coverage == Approx(0.9));
}

TEST_CASE("worked example at k = 3 and with binary gains") {
    // k = 3. A: first three [3, 1, 7]; hit item 1 at rank 2.
    //    precision 1/3, recall 1/3, DCG = 5/log2(3) = 3.1546488,
    //    IDCG@3 = 9.8391839 (as at k = 5, all three gains fit) -> NDCG 0.3206210.
    // B: first three [2, 6, 4]; hit item 2 at rank 1.
    //    precision 1/3, recall 1/2, DCG = 4, IDCG@3 = 7.5237190 -> NDCG 0.5316520.
    // Means: precision 1/3, recall (1/3 + 1/2)/2 = 0.4166667, NDCG 0.4261365.
    // Coverage: {3,1,7} u {2,6,4} u {5,6,7} = {1,2,3,4,5,6,7}: 7 of 10.
    const auto m3 = ranking_metrics(kRanked, kHeldOut, kItems, 3, 4.0);
    CHECK(m3.precision_at_k == Approx(1.0 / 3.0));
    CHECK(m3.recall_at_k == Approx(0.4166667).epsilon(1e-6));
    CHECK(m3.ndcg_at_k == Approx(0.4261365).epsilon(1e-6));
    CHECK(m3.catalogue_coverage == Approx(0.7));

    // Binary gains, k = 5.
    // A: DCG = 1/log2(3) + 1/log2(6) = 0.6309298 + 0.3868528 = 1.0177826;
    //    IDCG = 1 + 0.6309298 + 0.5 = 2.1309298 -> NDCG 0.4776237.
    // B: DCG = 1 + 0.3868528 = 1.3868528; IDCG = 1 + 0.6309298 = 1.6309298 -> 0.8503449.
    // Mean 0.6639843. Precision and recall do not depend on the gains.
    const auto bin = ranking_metrics(kRanked, kHeldOut, kItems, 5, 4.0, GainKind::binary);
    CHECK(bin.ndcg_at_k == Approx(0.6639843).epsilon(1e-6));
    CHECK(bin.precision_at_k == Approx(0.4));
}

TEST_CASE("a perfect ranking scores 1 and short lists count missing slots as misses") {
    // Ranked in the ideal order -> DCG = IDCG -> NDCG 1 (definition).
    const HeldOutRatings held = {{4, 5.0}, {2, 4.0}, {9, 1.0}};
    const std::vector<uint32_t> ideal = {4, 2, 9};
    const auto s = score_user(ideal, held, 2, 4.0);
    CHECK(s.ndcg == Approx(1.0));
    CHECK(s.precision == Approx(1.0));
    // A list of 2 at k = 5: 2 hits / 5 slots.
    const auto shortlist = score_user(std::vector<uint32_t>{4, 2}, held, 5, 4.0);
    CHECK(shortlist.precision == Approx(0.4));
    CHECK(shortlist.recall == Approx(1.0));
    CHECK(shortlist.ndcg == Approx(1.0));
    // Nobody with a relevant item: means are undefined, coverage still counts.
    const auto none = ranking_metrics({{1, 2}}, {{{1, 2.0}}}, 4, 2, 4.0);
    CHECK(none.users_evaluated == 0);
    CHECK(std::isnan(none.ndcg_at_k));
    CHECK(none.catalogue_coverage == Approx(0.5));
}

TEST_CASE("malformed inputs are rejected as a caller's bug") {
    CHECK_THROWS_AS(score_user(std::vector<uint32_t>{1, 1}, {}, 2, 4.0), std::invalid_argument);
    CHECK_THROWS_AS(score_user(std::vector<uint32_t>{1}, {}, 0, 4.0), std::invalid_argument);
    CHECK_THROWS_AS(score_user(std::vector<uint32_t>{1}, {{1, std::nan("")}}, 1, 4.0), std::invalid_argument);
    CHECK_THROWS_AS(ranking_metrics({{1}}, {}, 4, 1, 4.0), std::invalid_argument);
    CHECK_THROWS_AS(ranking_metrics({{7}}, {{}}, 4, 1, 4.0), std::invalid_argument);
    CHECK_THROWS_AS(ranking_metrics({{1}}, {{{9, 5.0}}}, 4, 1, 4.0), std::invalid_argument);
    // A repeat beyond the first k is outside the evaluated list and allowed.
    CHECK_NOTHROW(score_user(std::vector<uint32_t>{1, 2, 1}, {}, 2, 4.0));
}
