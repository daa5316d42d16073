// Tests for model/posterior/model_summary: the short summary's figures
// against the posterior they come from, the worst quantities in order with
// probes numbered (never a customer id), the noise as sampled or fixed, and
// the trace and diagnostics documents.
#include <catch2/catch.hpp>

#include <cmath>
#include <string>

#include <nlohmann/json.hpp>

#include "model/posterior/model_summary.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;
using nlohmann::json;

namespace {

Posterior with_documents(bool sampled_noise) {
    Posterior p = simulate_posterior({.users = 6, .items = 9, .rank = 2, .samples = 8, .chains = 2, .seed = 5});
    p.fit_metadata_json = json{{"created_at", "2027-03-01T09:30:00Z"},
                               {"seed", 42},
                               {"options", {{"sample_noise", sampled_noise}, {"fixed_noise_precision", 2.0}}},
                               {"timings", {{"total_s", 12.5}}},
                               {"validation", {{"kind", "holdout"}, {"fraction", 0.1}, {"rmse", 0.81}}},
                               {"trace", {{"sweep", {0, 1, 2}}, {"train_rmse", {0.9, 0.8, 0.7}}}}}
                              .dump();
    // Five quantities; two probes name a customer and a product.
    p.diagnostics_json = json{{"verdict", "not_converged"},
                              {"max_rhat", 1.2},
                              {"warnings", {"R-hat 1.2 for prediction(c-00017, tea-0003)"}},
                              {"quantities",
                               {{{"quantity", "noise_precision"}, {"rhat", 1.01}, {"ess_bulk", 300.0}},
                                {{"quantity", "prediction"}, {"user_id", "c-00017"}, {"item_id", "tea-0003"},
                                 {"rhat", 1.2}, {"ess_bulk", 40.0}},
                                {{"quantity", "mu_interaction"}, {"rhat", 1.05}, {"ess_bulk", 90.0}},
                                {{"quantity", "prediction"}, {"user_id", "c-00002"}, {"item_id", "tea-0001"},
                                 {"rhat", 1.05}, {"ess_bulk", 70.0}},
                                {{"quantity", "factor_cov_product"}, {"rhat", 1.0}, {"ess_bulk", 500.0}}}}}
                             .dump();
    return p;
}

}  // namespace

TEST_CASE("the summary reports the posterior's size and the fit's figures") {
    const Posterior p = with_documents(true);
    const json s = model_summary(p);
    CHECK(s["data"]["customers"] == p.num_users);
    CHECK(s["data"]["products"] == p.num_items);
    CHECK(s["data"]["ratings"] == p.rated_items.size());
    CHECK_FALSE(s["data"].contains("products_named"));  // no catalogue
    CHECK(s["rank"] == 2);
    CHECK(s["chains"] == 2);
    CHECK(s["samples"] == 8);
    CHECK(s["fit"]["created_at"] == "2027-03-01T09:30:00Z");
    CHECK(s["fit"]["seconds"] == 12.5);
    CHECK(s["fit"]["sweeps_per_chain"].is_null());  // not recorded: null, not invented
    CHECK(s["fit"]["rank_choice"].is_null());       // a given rank: no choice recorded
    CHECK(s["validation"]["rmse"] == 0.81);
    CHECK(s["convergence"]["verdict"] == "not_converged");
    CHECK(s["convergence"]["warnings"] == 1);
    // Short: the traces and per-quantity figures are elsewhere.
    CHECK(s.dump().find("train_rmse") == std::string::npos);
    CHECK(fit_trace(p)["train_rmse"].size() == 3);
}

TEST_CASE("the summary says how the rank was chosen, without the held-out figures") {
    Posterior p = with_documents(true);
    json meta = json::parse(p.fit_metadata_json);
    meta["rank_choice"] = {{"source", "held_out"}, {"rank", 2}, {"candidates", {2, 4}}, {"rule", "the simplest"},
                           {"scores", {{{"rank", 2}, {"mean_log_predictive_density", -1.2}}}}};
    p.fit_metadata_json = meta.dump();
    const json c = model_summary(p)["fit"]["rank_choice"];
    CHECK(c == json{{"source", "held_out"}, {"candidates", {2, 4}}, {"rule", "the simplest"}});
}

TEST_CASE("the worst quantities come highest R-hat first, then lowest ESS, with probes numbered") {
    const Posterior p = with_documents(true);
    const json worst = model_summary(p)["convergence"]["worst"];
    REQUIRE(worst.size() == 3);
    CHECK(worst[0]["quantity"] == "prediction(probe 1)");
    CHECK(worst[0]["r_hat"] == 1.2);
    // Two at R-hat 1.05: the lower bulk ESS (70, probe 2) first.
    CHECK(worst[1]["quantity"] == "prediction(probe 2)");
    CHECK(worst[1]["ess_bulk"] == 70.0);
    CHECK(worst[2]["quantity"] == "mu_interaction");
    const std::string everything = model_summary(p).dump() + public_diagnostics(p).dump();
    CHECK(everything.find("c-00017") == std::string::npos);
    CHECK(everything.find("c-00002") == std::string::npos);
    CHECK(public_diagnostics(p)["warnings"][0] == "R-hat 1.2 for prediction(probe 1)");
}

TEST_CASE("sampled noise shows its posterior mean sd, fixed noise its precision") {
    const Posterior sampled = with_documents(true);
    const json a = model_summary(sampled)["noise"];
    double sd = 0.0;  // direct: mean over samples of 1 / sqrt(tau_s)
    for (float tau : sampled.noise_precision) sd += 1.0 / std::sqrt(double(tau)) / sampled.noise_precision.size();
    CHECK(a["sampled"] == true);
    CHECK(a["sd_posterior_mean"].get<double>() == Approx(sd).epsilon(1e-12));
    CHECK_FALSE(a.contains("precision"));

    Posterior fixed = with_documents(false);
    for (float& tau : fixed.noise_precision) tau = 4.0f;
    const json b = model_summary(fixed)["noise"];
    CHECK(b["sampled"] == false);
    CHECK(b["precision"] == 4.0);
    CHECK(b["sd"] == 0.5);
}

TEST_CASE("documents that are missing or do not parse give nulls, never a throw") {
    Posterior p = simulate_posterior({.users = 3, .items = 4, .rank = 2, .samples = 4, .chains = 1, .seed = 2});
    p.fit_metadata_json = "not json";
    p.diagnostics_json = "{}";
    const json s = model_summary(p);
    CHECK(s["validation"].is_null());
    CHECK(s["convergence"]["verdict"].is_null());
    CHECK(s["convergence"]["worst"].empty());
    CHECK(s["noise"]["sampled"] == true);
    CHECK(fit_trace(p).empty());
}
