// Tests for model/convergence_summary: which quantities are assessed, the
// verdict and warnings, and the JSON stored in Posterior::diagnostics_json.
// Scenario: a small invented shop, customers "cust-*" rating items "item-*".
#include <catch2/catch.hpp>

#include <cmath>
#include <set>
#include <stdexcept>
#include <string>

#include "model/fit/convergence_summary.hpp"
#include "model/math/random.hpp"

using namespace credence;

namespace {

// 6 customers x 10 items, each customer rated 5 items (30 rated pairs), rank 2,
// `chains` chains of `per_chain` samples. Every sampled value is an
// independent draw, i.e. a perfectly mixed fit.
Posterior mixed_posterior(uint32_t chains, uint32_t per_chain, uint64_t seed) {
    Posterior p;
    p.rank = 2;
    p.num_users = 6;
    p.num_items = 10;
    p.num_chains = chains;
    p.num_samples = chains * per_chain;
    p.has_biases = false;
    for (uint32_t u = 0; u < p.num_users; ++u) p.user_ids.push_back("cust-" + std::to_string(u));
    for (uint32_t i = 0; i < p.num_items; ++i) p.item_ids.push_back("item-" + std::to_string(i));
    p.global_mean = 3.5f;
    p.scale = {1.0f, 5.0f, true};
    const size_t S = p.num_samples, K = p.rank;
    Rng rng(seed);
    auto fill = [&](std::vector<float>& v, size_t count, double centre, double spread) {
        v.resize(count);
        for (float& x : v) x = static_cast<float>(centre + spread * rng.normal());
    };
    for (uint32_t c = 0; c < chains; ++c)
        for (uint32_t j = 0; j < per_chain; ++j) p.sample_chain.push_back(c);
    fill(p.user_factors, S * p.num_users * K, 0.0, 0.5);
    fill(p.item_factors, S * p.num_items * K, 0.0, 0.5);
    fill(p.noise_precision, S, 2.0, 0.1);
    fill(p.user_mu, S * K, 0.0, 0.1);
    fill(p.item_mu, S * K, 0.0, 0.1);
    // Precisions: diagonal, 1 + a small positive jitter, so both are positive definite.
    p.user_lambda.assign(S * K * K, 0.0f);
    p.item_lambda.assign(S * K * K, 0.0f);
    for (size_t s = 0; s < S; ++s)
        for (size_t k = 0; k < K; ++k) {
            p.user_lambda[s * K * K + k * K + k] = static_cast<float>(1.0 + 0.05 * std::abs(rng.normal()));
            p.item_lambda[s * K * K + k * K + k] = static_cast<float>(1.0 + 0.05 * std::abs(rng.normal()));
        }
    p.rated_offsets.push_back(0);
    for (uint32_t u = 0; u < p.num_users; ++u) {
        for (uint32_t i = u % 2; i < p.num_items; i += 2) p.rated_items.push_back(i);
        p.rated_offsets.push_back(p.rated_items.size());
    }
    p.validate();
    return p;
}

}  // namespace

TEST_CASE("a well-mixed fit is converged with no warnings") {
    // 4 chains x 1000 iid draws: each R-hat - 1 has sd ~ 0.0005 (see
    // test_diagnostics), so 1.01 is ~20 sd away even for the max over 25
    // quantities; ESS per chain ~ 1000 against the 100 threshold.
    const Posterior p = mixed_posterior(4, 1000, 1);
    const auto s = summarize_convergence(p);
    CHECK(s.num_chains == 4);
    CHECK(s.draws_per_chain == 1000);
    // noise precision + mu_interaction + factor_cov_product + 20 of the 30 rated pairs.
    REQUIRE(s.quantities.size() == 1 + 2 + 20);
    CHECK(s.verdict == "converged");
    CHECK(s.warnings.empty());
    CHECK(s.max_rhat < 1.01);
    CHECK(s.min_ess_bulk_per_chain > 500);
    CHECK(s.min_ess_tail_per_chain > 500);
}

TEST_CASE("probe pairs are distinct rated pairs chosen by the seed") {
    const Posterior p = mixed_posterior(2, 50, 2);
    auto pairs_of = [&](uint64_t seed) {
        ConvergenceOptions o;
        o.probe_seed = seed;
        std::vector<std::pair<std::string, std::string>> pairs;
        for (const auto& q : summarize_convergence(p, o).quantities)
            if (q.quantity == "prediction") pairs.emplace_back(q.user_id, q.item_id);
        return pairs;
    };
    const auto a = pairs_of(7), b = pairs_of(7), c = pairs_of(8);
    CHECK(a == b);
    CHECK(a != c);
    REQUIRE(a.size() == 20);
    CHECK(std::set(a.begin(), a.end()).size() == 20);
    for (const auto& [user, item] : a) {
        // cust-u rated the items of u's parity (see mixed_posterior).
        const int u = std::stoi(user.substr(5)), i = std::stoi(item.substr(5));
        CHECK(u % 2 == i % 2);
    }
    ConvergenceOptions all;
    all.max_probe_pairs = 100;
    CHECK(summarize_convergence(p, all).quantities.size() == 3 + 30);
}

TEST_CASE("a probe pair's label is its number, never its ids, here and when read back from JSON") {
    const Posterior p = mixed_posterior(2, 50, 2);
    const ConvergenceSummary s = summarize_convergence(p);
    const std::optional<ConvergenceSummary> read = convergence_from_json(to_json(s));
    REQUIRE(read.has_value());
    const ConvergenceSummary& back = *read;
    for (const ConvergenceSummary* summary : {&s, &back}) {
        uint32_t k = 0;
        for (const auto& q : summary->quantities) {
            if (q.quantity != "prediction") {
                CHECK(q.label() == q.quantity);
                continue;
            }
            ++k;
            CHECK(q.label() == "prediction(probe " + std::to_string(k) + ")");
            CHECK(q.id_label() == "prediction(" + q.user_id + ", " + q.item_id + ")");
        }
        CHECK(k == 20);
    }
}

TEST_CASE("a chain stuck elsewhere or a slowly mixing quantity is flagged") {
    Posterior shifted = mixed_posterior(4, 1000, 3);
    // Chain 3's user_mu[1] and item_mu[1] both sit 3 sd away from the others,
    // so mu_U . mu_V shifts by ~0.09, over 6 of its sds (~0.014).
    for (uint32_t s = 3000; s < 4000; ++s) {
        shifted.user_mu[size_t(s) * 2 + 1] += 0.3f;
        shifted.item_mu[size_t(s) * 2 + 1] += 0.3f;
    }
    const auto a = summarize_convergence(shifted);
    CHECK(a.verdict == "not_converged");
    CHECK(a.max_rhat > 1.1);
    REQUIRE(!a.warnings.empty());
    CHECK(a.warnings.front().find("mu_interaction") != std::string::npos);

    // Noise precision as an AR(1) with rho = 0.99: ESS per chain ~ 1000 *
    // 0.01/1.99 ~ 5, far below 100 (AR(1) autocorrelation time, see
    // test_diagnostics).
    Posterior sticky = mixed_posterior(4, 1000, 4);
    for (uint32_t c = 0; c < 4; ++c) {
        Rng rng(100 + c);
        double x = rng.normal();
        for (uint32_t j = 0; j < 1000; ++j) {
            sticky.noise_precision[c * 1000 + j] = static_cast<float>(2.0 + 0.1 * x);
            x = 0.99 * x + std::sqrt(1 - 0.99 * 0.99) * rng.normal();
        }
    }
    const auto b = summarize_convergence(sticky);
    CHECK(b.verdict == "not_converged");
    CHECK(b.min_ess_bulk_per_chain < 50);
    bool names_it = false;
    for (const auto& w : b.warnings) names_it |= w.find("ESS below 100") != std::string::npos &&
                                                 w.find("noise_precision") != std::string::npos;
    CHECK(names_it);
}

TEST_CASE("short, uneven or constant chains are reported, not fatal") {
    const auto tiny = summarize_convergence(mixed_posterior(2, 3, 5));
    CHECK(tiny.verdict == "not_assessable");
    CHECK(tiny.quantities.empty());
    CHECK(!tiny.warnings.empty());

    // Uneven: chain 0 keeps 600 samples, chain 1 keeps 400 -> both assessed on 400.
    Posterior uneven = mixed_posterior(2, 500, 6);
    for (uint32_t s = 500; s < 600; ++s) uneven.sample_chain[s] = 0;
    uneven.validate();
    const auto u = summarize_convergence(uneven);
    CHECK(u.draws_per_chain == 400);
    CHECK(u.warnings.front().find("last 400 draws") != std::string::npos);

    // A constant noise precision has undefined figures: null in JSON, warned.
    Posterior fixed = mixed_posterior(4, 500, 7);
    std::fill(fixed.noise_precision.begin(), fixed.noise_precision.end(), 2.0f);
    const auto f = summarize_convergence(fixed);
    CHECK(std::isnan(f.quantities.front().stats.rhat));
    CHECK(f.verdict == "converged");  // the other quantities are fine
    REQUIRE(f.warnings.size() == 1);
    CHECK(f.warnings.front().find("undefined") != std::string::npos);
    const auto j = nlohmann::json::parse(to_json(f).dump());
    CHECK(j["quantities"][0]["rhat"].is_null());

    CHECK_THROWS_AS(summarize_convergence(fixed, ConvergenceOptions{.max_rhat = 0.9}), std::invalid_argument);
    CHECK_THROWS_AS(summarize_convergence(fixed, ConvergenceOptions{.min_ess_per_chain = -1.0}), std::invalid_argument);
}

TEST_CASE("JSON form carries every figure in snake_case") {
    const Posterior p = mixed_posterior(4, 300, 8);
    const auto s = summarize_convergence(p);
    const auto j = nlohmann::json::parse(to_json(s).dump());
    CHECK(j["num_chains"] == 4);
    CHECK(j["draws_per_chain"] == 300);
    CHECK(j["verdict"] == s.verdict);
    CHECK(j["max_rhat"].get<double>() == Approx(s.max_rhat));
    CHECK(j["min_ess_bulk_per_chain"].get<double>() == Approx(s.min_ess_bulk_per_chain));
    CHECK(j["min_ess_tail_per_chain"].get<double>() == Approx(s.min_ess_tail_per_chain));
    CHECK(j["thresholds"]["max_rhat"] == 1.01);
    CHECK(j["thresholds"]["min_ess_per_chain"] == 100.0);
    REQUIRE(j["quantities"].size() == s.quantities.size());
    CHECK(j["quantities"][0]["quantity"] == "noise_precision");
    CHECK(j["quantities"][1]["quantity"] == "mu_interaction");
    CHECK(j["quantities"][2]["quantity"] == "factor_cov_product");
    const auto& last = j["quantities"].back();
    CHECK(last["quantity"] == "prediction");
    CHECK(last["user_id"].get<std::string>().rfind("cust-", 0) == 0);
    CHECK(last["ess_bulk"].get<double>() == Approx(s.quantities.back().stats.ess_bulk));
}
