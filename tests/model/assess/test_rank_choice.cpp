// Tests for choosing a fit's rank from its ratings (model/assess/rank_choice.cpp):
// it finds a known rank on data drawn from the model, it runs compare's
// short fits with the fit's own model options, and it refuses data too small
// to tell ranks apart.
#include <catch2/catch.hpp>

#include <cmath>
#include <iostream>

#include "model/assess/rank_choice.hpp"
#include "model/error.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

SimulatedData rank_three_data(uint32_t users, uint32_t items, uint64_t seed) {
    SimulationOptions sim;
    sim.users = users;
    sim.items = items;
    sim.rank = 3;
    sim.density = 0.3;
    sim.noise_sd = 0.5;
    sim.factor_sd = 1.0;
    sim.seed = seed;
    return simulate_ratings(sim);
}

}  // namespace

TEST_CASE("on data drawn from a rank-3 model the choice is rank 3, not a smaller or a larger one") {
    const SimulatedData data = rank_three_data(300, 200, 31);  // about 18,000 ratings
    FitOptions fit;
    fit.biases = false;  // the simulated truth has none
    fit.seed = 5;
    const RankChoice choice = choose_rank(data.ratings, fit, RankChoiceOptions{.candidates = {1, 3, 8}},
                                          [](const std::string& s) { std::cerr << s << "\n"; });
    std::cerr << format_table(choice.comparison);
    REQUIRE(choice.comparison.configs.size() == 3);
    // Rank 1 cannot express a rank-3 truth: worse than the best by many paired
    // SEs. Rank 8 holds the truth too, so it is at best within noise of rank 3,
    // and the one-SE rule (Hastie, Tibshirani & Friedman 2009, section 7.10)
    // then takes the simpler rank 3.
    CHECK(choice.comparison.configs[0].difference_to_best < -5 * choice.comparison.configs[0].difference_se);
    CHECK(choice.rank == 3);
    CHECK(choice.rank == choice.comparison.configs[choice.comparison.recommended].rank);

    const nlohmann::json j = to_json(choice);
    CHECK(j["rank"] == 3);
    CHECK(j["candidates"] == nlohmann::json({1, 3, 8}));
    CHECK(j["held_out_ratings"] == std::llround(0.1 * data.ratings.size()));
    CHECK(j["scores"].size() == 3);
    CHECK(j["scores"][1]["difference_to_best"].get<double>() <= 0.0);
    CHECK(describe(choice).rfind("rank 3, chosen from 1, 3, 8 on ", 0) == 0);
}

TEST_CASE("the choice fits every candidate with the fit's model options but compare's short fixed run") {
    const SimulatedData data = rank_three_data(120, 80, 32);
    FitOptions fit;
    fit.biases = false;
    fit.seed = 77;
    fit.chains = 3;
    fit.run_length = RunLength::converged;  // the real fit's run length does not apply to the choice
    fit.samples = 500;
    const RankChoice choice = choose_rank(data.ratings, fit, RankChoiceOptions{.candidates = {2, 4}});
    const nlohmann::json& s = choice.comparison.settings;
    const FitOptions short_run = CompareOptions{}.fit;
    CHECK(s["split_seed"] == 77);
    CHECK(s["fit"]["run_length"] == "fixed");
    CHECK(s["fit"]["burn_in"] == short_run.burn_in);
    CHECK(s["fit"]["samples"] == short_run.samples);
    CHECK(s["fit"]["thin"] == short_run.thin);
    CHECK(s["fit"]["chains"] == 3);
    for (const ConfigScore& c : choice.comparison.configs) CHECK_FALSE(c.biases);
}

TEST_CASE("the choice refuses data too small to tell ranks apart and says to give the rank") {
    const SimulatedData data = rank_three_data(20, 10, 33);  // about 60 ratings: 6 held out
    FitOptions fit;
    try {
        choose_rank(data.ratings, fit, RankChoiceOptions{});
        FAIL("expected a DataError");
    } catch (const DataError& e) {
        const std::string what = e.what();
        CHECK(what.find("fewer than the 50 needed") != std::string::npos);
        CHECK(what.find("--rank K") != std::string::npos);
    }
    CHECK_THROWS_WITH(choose_rank(data.ratings, fit, RankChoiceOptions{.candidates = {2, 2}, .min_held_out_ratings = 1}),
                      Catch::Contains("rank 2 is listed twice in --auto-ranks"));
    CHECK_THROWS_AS(choose_rank(data.ratings, fit, RankChoiceOptions{.candidates = {}, .min_held_out_ratings = 1}),
                    OptionError);
}
