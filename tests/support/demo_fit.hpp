// A shared fixture of the CLI tests: the demo shop's export (credence
// demo-data), a short fixed-length fit of it with 10% held out, and the
// held-out rows fit wrote (--holdout-out), all made through the program as a
// user would; plus reading a file whole, to check it was left as it was.
#pragma once
#include <cstdint>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include <catch2/catch.hpp>

#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

namespace credence::testing {

// The file's bytes; empty when it cannot be read.
inline std::string file_bytes(const std::filesystem::path& path) {
    std::ifstream in(path, std::ios::binary);
    std::stringstream s;
    s << in.rdbuf();
    return s.str();
}

struct ShortDemoFitSpec {
    std::string scratch;           // scratch_dir name (emptied first)
    uint32_t customers = 300;
    uint32_t products = 80;
    uint64_t data_seed = 11;       // demo-data --seed
    uint32_t rank = 3;
    uint32_t burn_in = 20;
    uint32_t samples = 10;         // per chain, thin 1, 2 chains, fit --seed 3
    std::string held_out_name = "held-out.csv";
};

struct ShortDemoFit {
    std::filesystem::path dir, ratings, model, held_out;  // ratings.csv, shop.posterior, the held-out rows
};

// Makes the export and the fit; fails the calling test (REQUIRE) when either
// command fails. Callers cache it in a function-local static: it takes a
// second or so.
inline ShortDemoFit short_demo_fit(const ShortDemoFitSpec& spec) {
    ShortDemoFit x;
    x.dir = scratch_dir(spec.scratch);
    const auto data = run_credence("demo-data --out-dir " + quoted(x.dir) + " --customers " +
                                   std::to_string(spec.customers) + " --products " + std::to_string(spec.products) +
                                   " --seed " + std::to_string(spec.data_seed));
    INFO(data.err);
    REQUIRE(data.exit_code == 0);
    x.ratings = x.dir / "ratings.csv";
    x.model = x.dir / "shop.posterior";
    x.held_out = x.dir / spec.held_out_name;
    const auto fit = run_credence("fit --ratings " + quoted(x.ratings) + " --scale 1:5 --rank " +
                                  std::to_string(spec.rank) + " --run-length fixed --burn-in " +
                                  std::to_string(spec.burn_in) + " --samples " + std::to_string(spec.samples) +
                                  " --thin 1 --chains 2 --seed 3 --holdout 0.1 --holdout-out " + quoted(x.held_out) +
                                  " -q --out " + quoted(x.model));
    INFO(fit.err);
    REQUIRE(fit.exit_code == 0);
    return x;
}

}  // namespace credence::testing
