// Tests for model/assess/release_gate.cpp: the paired held-out comparison of
// two models (which ratings count, exact zeros for a model against itself,
// the paired SE) and the rule that refuses a new model: not converged, or
// worse by more than two standard errors of the paired difference.
#include <catch2/catch.hpp>

#include <cmath>
#include <string>
#include <vector>

#include "model/assess/release_gate.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

// A comparison on 400 ratings whose mean log-density difference is `mean`
// with paired SE `se`.
PairedAccuracy accuracy_with(double mean, double se) {
    PairedAccuracy a;
    a.ratings = a.compared = 400;
    a.before_log_density = -1.20;
    a.after_log_density = -1.20 + mean;
    a.log_density_difference = mean;
    a.log_density_difference_se = se;
    return a;
}

}  // namespace

TEST_CASE("the gate refuses a converged model worse by more than two paired standard errors, and only then") {
    const std::vector<std::string> converged{"converged"};
    SECTION("worse by 2.5 SE: refused, and the reason gives both figures and the SE") {
        const auto a = accuracy_with(-0.050, 0.020);
        const GateDecision d = judge_release(&a, converged);
        CHECK_FALSE(d.pass);
        REQUIRE(d.reasons.size() == 1);
        CHECK(d.reasons[0].find("0.0500 below the live model's") != std::string::npos);
        CHECK(d.reasons[0].find("SE 0.0200") != std::string::npos);
        CHECK(d.record["passed"] == false);
    }
    SECTION("worse by 1.5 SE: within the noise, passed") {
        const auto a = accuracy_with(-0.030, 0.020);
        const GateDecision d = judge_release(&a, converged);
        CHECK(d.pass);
        CHECK(d.reasons.empty());
        CHECK(d.record["passed"] == true);
    }
    SECTION("better: passed") {
        const auto a = accuracy_with(0.200, 0.020);
        CHECK(judge_release(&a, converged).pass);
    }
    SECTION("exactly two SE worse is not more than two: passed") {
        const auto a = accuracy_with(-0.040, 0.020);
        CHECK(judge_release(&a, converged).pass);
    }
}

TEST_CASE("the gate refuses a model that did not converge, or whose checked fit did not, however accurate") {
    const auto better = accuracy_with(0.300, 0.010);
    const GateDecision d = judge_release(&better, {"not_converged"});
    CHECK_FALSE(d.pass);
    REQUIRE(d.reasons.size() == 1);
    CHECK(d.reasons[0].find("did not converge") != std::string::npos);
    // --refit-on-all: the checked fit and the refit both count.
    CHECK_FALSE(judge_release(&better, {"converged", "not_assessable"}).pass);
    CHECK(judge_release(&better, {"converged", "converged"}).pass);
    // Both reasons when both hold.
    const auto worse = accuracy_with(-0.300, 0.010);
    CHECK(judge_release(&worse, {"not_converged"}).reasons.size() == 2);
}

TEST_CASE("with no live model or nothing to compare on, the gate checks convergence and says what it could not") {
    const GateDecision first = judge_release(nullptr, {"converged"});
    CHECK(first.pass);
    REQUIRE(first.notes.size() == 1);
    CHECK(first.notes[0].find("no live model") != std::string::npos);
    CHECK(first.record["accuracy"].is_null());

    PairedAccuracy none;
    none.ratings = 50;
    none.unknown = 30;
    none.trained = 20;
    none.log_density_difference = NAN;
    none.log_density_difference_se = NAN;
    const GateDecision d = judge_release(&none, {"converged"});
    CHECK(d.pass);
    REQUIRE(d.notes.size() == 1);
    CHECK(d.notes[0].find("30 have an id one model lacks, 20 were trained on") != std::string::npos);
    CHECK_FALSE(judge_release(&none, {"not_converged"}).pass);
}

TEST_CASE("a model paired with itself differs by exactly zero, and unknown ids and training pairs are left out") {
    const Posterior p = simulate_posterior(SimulatedPosteriorOptions{
        .users = 30, .items = 40, .rank = 3, .samples = 20, .chains = 2, .seed = 8, .rated_fraction = 0.3});
    // Every pair of the first 20 customers and 30 products, plus a customer
    // and a product the model never saw.
    RatingSet test;
    test.scale = p.scale;
    uint64_t expected_trained = 0;
    const IdMap users = IdMap::from_names(p.user_ids), items = IdMap::from_names(p.item_ids);
    for (uint32_t u = 0; u < 20; ++u)
        for (uint32_t i = 0; i < 30; ++i) {
            test.ratings.push_back(Rating{test.users.intern(p.user_ids[u]), test.items.intern(p.item_ids[i]),
                                          float(1 + (u + i) % 5)});
            for (const uint32_t rated : p.rated_by(u)) expected_trained += rated == i;
        }
    const uint32_t stranger = test.users.intern("cust-9999"), novelty = test.items.intern("sku-9999");
    test.ratings.push_back(Rating{stranger, 0, 4.0f});
    test.ratings.push_back(Rating{0, novelty, 2.0f});

    const PairedAccuracy a = paired_accuracy(p, p, test);
    CHECK(a.ratings == 602);
    CHECK(a.unknown == 2);
    CHECK(a.trained == expected_trained);
    CHECK(a.compared == 600 - expected_trained);
    CHECK(expected_trained > 50);  // rated_fraction 0.3 of 600 pairs
    CHECK(a.log_density_difference == 0.0);
    CHECK(a.log_density_difference_se == 0.0);
    CHECK(a.before_log_density == a.after_log_density);
    CHECK(std::isfinite(a.before_log_density));
    CHECK(a.before_rmse == a.after_rmse);
    CHECK(judge_release(&a, {"converged"}).pass);

    // Another model: a difference with a finite, positive paired SE, and
    // the comparison is antisymmetric.
    const Posterior q = simulate_posterior(SimulatedPosteriorOptions{
        .users = 30, .items = 40, .rank = 3, .samples = 20, .chains = 2, .seed = 9, .rated_fraction = 0.3});
    const PairedAccuracy pq = paired_accuracy(p, q, test), qp = paired_accuracy(q, p, test);
    CHECK(pq.log_density_difference_se > 0.0);
    CHECK(pq.log_density_difference == Approx(-qp.log_density_difference).margin(1e-12));
    CHECK(pq.log_density_difference_se == Approx(qp.log_density_difference_se).margin(1e-12));
}
