// Tests for cli/delta_command.cpp, run as a user would: last night's and
// tonight's models of the demo shop, where tonight's export lost a product
// and gained one and five customers. Text and --json name the new and
// dropped products and the products that moved, count customers without
// naming them (unless asked), and --validation adds the paired accuracy.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <string>

#include <nlohmann/json.hpp>

#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

struct Nights {
    fs::path dir, before, after, tonight_held_out;
};

const Nights& nights() {
    static const Nights n = [] {
        Nights x;
        x.dir = scratch_dir("delta_command");
        REQUIRE(run_credence("demo-data --out-dir " + quoted(x.dir) + " --customers 300 --products 80 --seed 11")
                    .exit_code == 0);
        // Tonight: every tea-0013 row gone; gift-0001 and customers
        // c-99001..c-99005 new.
        const auto last = x.dir / "ratings.csv", tonight = x.dir / "tonight.csv";
        {
            std::ifstream in(last);
            std::ofstream out(tonight);
            for (std::string line; std::getline(in, line);)
                if (line.find(",tea-0013,") == std::string::npos) out << line << "\n";
            for (int c = 1; c <= 5; ++c) {
                out << "c-9900" << c << ",gift-0001," << 1 + c % 5 << ",1767300000\n";
                out << "c-9900" << c << ",kitchen-0017," << 1 + (c + 2) % 5 << ",1767300100\n";
            }
            for (int c = 1; c <= 20; ++c) out << "c-" << (c < 10 ? "0000" : "000") << c << ",gift-0001," << 1 + c % 5 << ",1767300200\n";
        }
        x.before = x.dir / "before.posterior";
        x.after = x.dir / "after.posterior";
        x.tonight_held_out = x.dir / "tonight-held-out.csv";
        const std::string run = " --scale 1:5 --rank 3 --run-length fixed --burn-in 20 --samples 10 --thin 1 --chains 2 "
                                "--seed 3 -q --holdout 0.1";
        REQUIRE(run_credence("fit --ratings " + quoted(last) + run + " --out " + quoted(x.before)).exit_code == 0);
        REQUIRE(run_credence("fit --ratings " + quoted(tonight) + run + " --out " + quoted(x.after) + " --holdout-out " +
                             quoted(x.tonight_held_out))
                    .exit_code == 0);
        return x;
    }();
    return n;
}

}  // namespace

TEST_CASE("delta as text names the new and dropped products and the movers, and counts customers") {
    const auto r = run_credence("delta " + quoted(nights().before) + " " + quoted(nights().after) + " --top 5");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    INFO(r.out);
    CHECK(r.out.find("customers: 300 -> 305 (300 kept, 5 new, 0 dropped)") != std::string::npos);
    CHECK(r.out.find("products: 80 -> 80 (79 kept, 1 new, 1 dropped)") != std::string::npos);
    CHECK(r.out.find("new: gift-0001") != std::string::npos);
    CHECK(r.out.find("dropped: tea-0013") != std::string::npos);
    CHECK(r.out.find("products whose predicted mean moved most") != std::string::npos);
    CHECK(r.out.find("c-9900") == std::string::npos);  // customer ids stay out unless asked for

    const auto listed = run_credence("delta " + quoted(nights().before) + " " + quoted(nights().after) +
                                     " --show-customer-ids");
    REQUIRE(listed.exit_code == 0);
    CHECK(listed.out.find("c-99003") != std::string::npos);
}

TEST_CASE("delta --json names the new and dropped ids and the products that moved, with held-out accuracy") {
    const auto r = run_credence("delta " + quoted(nights().before) + " " + quoted(nights().after) +
                                " --json --top 4 --validation " + quoted(nights().tonight_held_out));
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    const json d = json::parse(r.out);
    CHECK(d["customers"]["added"] == 5);
    CHECK(d["products"]["added_ids"] == json::array({"gift-0001"}));
    CHECK(d["products"]["dropped_ids"] == json::array({"tea-0013"}));
    REQUIRE(d["mean_moves"].size() == 4);
    const auto& top = d["mean_moves"][0];
    CHECK(top["product"].is_string());
    CHECK(top["mean_after"].get<double>() != top["mean_before"].get<double>());
    REQUIRE(d["sd_moves"].size() == 4);
    // The held-out rows of tonight's fit: the new model never saw them; the
    // old one saw some (same seed, another export) and those are skipped.
    REQUIRE(d["accuracy"].is_object());
    CHECK(d["accuracy"]["compared"].get<int>() > 0);
    CHECK(d["accuracy"]["log_density_difference_se"].get<double>() > 0.0);
    CHECK(r.out.find("c-9900") == std::string::npos);
}
