// Tests for cli/evaluate_command.cpp, run as a user would: a product-mean
// baseline beside the model's figures; exit 1 when nothing can be scored;
// warnings on stderr when the pairs were in training or most rows have ids
// the model does not know; the held-out rows of fit --holdout-out score
// without a warning; and a SQLite source scores like the CSV file.
#include <catch2/catch.hpp>

#include <sqlite3.h>

#include <filesystem>
#include <fstream>
#include <memory>
#include <sstream>
#include <string>

#include <nlohmann/json.hpp>

#include "tests/support/demo_fit.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

// The demo export, and a short fit holding 10% out (written by --holdout-out).
const ShortDemoFit& shop() {
    static const ShortDemoFit s = short_demo_fit({.scratch = "evaluate_command"});
    return s;
}

}  // namespace

TEST_CASE("evaluate on the held-out rows shows the model beside the product-mean baseline, without warnings") {
    const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(shop().held_out) +
                                " --no-ranking");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.out.find("baseline") != std::string::npos);
    CHECK(r.out.find("each product's mean training rating") != std::string::npos);
    CHECK(r.err.find("warning:") == std::string::npos);

    const auto j = run_credence("evaluate --json --model " + quoted(shop().model) + " --ratings " +
                                quoted(shop().held_out) + " --no-ranking");
    REQUIRE(j.exit_code == 0);
    const json doc = json::parse(j.out);
    CHECK(doc["warnings"].empty());
    CHECK(doc["in_training"] == 0);
    // The model beats the product mean on this export (the demo shop has
    // customer tastes to learn); both figures are present.
    CHECK(doc["baseline"]["rmse"].get<double>() > doc["rmse"].get<double>());
}

TEST_CASE("evaluate on the training file warns that the pairs were in training") {
    const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(shop().ratings) +
                                " --no-ranking");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.err.find("warning:") != std::string::npos);
    CHECK(r.err.find("pairs the model was trained on") != std::string::npos);
    CHECK(r.err.find("--holdout-out") != std::string::npos);
}

TEST_CASE("evaluate warns when most rows have unknown ids, and exits 1 when nothing can be scored") {
    const auto dir = scratch_dir("evaluate_command_unknown");
    const auto mostly = dir / "mostly-strangers.csv";
    {
        std::ofstream out(mostly);
        out << "customer_id,product_sku,stars\n";
        std::ifstream held(shop().held_out);
        std::string line;
        std::getline(held, line);
        for (int k = 0; k < 3 && std::getline(held, line);) out << line << "\n", ++k;  // three known rows
        for (int k = 0; k < 40; ++k) out << "walk-in-" << k << ",kitchen-0001," << 1 + k % 5 << "\n";
    }
    const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(mostly) +
                                " --no-ranking");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.err.find("only 3 of the 43 ratings could be scored") != std::string::npos);

    const auto none = dir / "strangers.csv";
    {
        std::ofstream out(none);
        out << "customer_id,product_sku,stars\n";
        for (int k = 0; k < 10; ++k) out << "walk-in-" << k << ",kitchen-0001,4\n";
    }
    const auto n = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(none));
    CHECK(n.exit_code == 1);
    CHECK(n.err.find("none of the 10 ratings could be scored") != std::string::npos);
    CHECK(n.out.find("nan") == std::string::npos);
}

TEST_CASE("evaluate --json still says on stderr how many rows it read and rejected") {
    const auto dir = scratch_dir("evaluate_command_json_rejects");
    const auto file = dir / "held-out-with-a-bad-row.csv";
    fs::copy_file(shop().held_out, file, fs::copy_options::overwrite_existing);
    std::ofstream(file, std::ios::app) << "c-00001,kitchen-0001,lots\n";
    const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(file) +
                                " --no-ranking --json");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.err.find("rejected 1") != std::string::npos);
    CHECK(json::parse(r.out).at("rated").get<uint64_t>() > 0);
}

TEST_CASE("evaluate reads held-out ratings from a SQLite database like the same rows in a file") {
    const auto dir = scratch_dir("evaluate_command_sqlite");
    const auto db = dir / "held-out.db";
    {
        sqlite3* raw = nullptr;
        REQUIRE(sqlite3_open(db.c_str(), &raw) == SQLITE_OK);
        std::unique_ptr<sqlite3, int (*)(sqlite3*)> handle(raw, &sqlite3_close);
        std::string sql = "CREATE TABLE held_out (customer TEXT, product TEXT, rating REAL);";
        std::ifstream held(shop().held_out);
        std::string line;
        std::getline(held, line);
        while (std::getline(held, line)) {
            std::stringstream fields(line);
            std::string c, p, v;
            std::getline(fields, c, ',');
            std::getline(fields, p, ',');
            std::getline(fields, v, ',');
            sql += "INSERT INTO held_out VALUES ('" + c + "', '" + p + "', " + v + ");";
        }
        REQUIRE(sqlite3_exec(handle.get(), sql.c_str(), nullptr, nullptr, nullptr) == SQLITE_OK);
    }
    const std::string tail = " --model " + quoted(shop().model) + " --no-ranking --json";
    const auto from_file = run_credence("evaluate --ratings " + quoted(shop().held_out) + tail);
    const auto from_db = run_credence("evaluate --ratings " + quoted(fs::path("sqlite:" + db.string())) +
                                      " --query 'SELECT * FROM held_out ORDER BY rowid'" + tail);
    INFO(from_db.err);
    REQUIRE(from_file.exit_code == 0);
    REQUIRE(from_db.exit_code == 0);
    const json a = json::parse(from_file.out), b = json::parse(from_db.out);
    CHECK(a["rated"] == b["rated"]);
    CHECK(a["rmse"] == b["rmse"]);
    CHECK(a["mean_log_predictive_density"] == b["mean_log_predictive_density"]);

    const auto no_query = run_credence("evaluate --ratings " + quoted(fs::path("sqlite:" + db.string())) + tail);
    CHECK(no_query.exit_code == 2);
    CHECK(no_query.err.find("--query") != std::string::npos);
}

TEST_CASE("evaluate refuses a relevance threshold outside the model's scale instead of printing empty ranking figures") {
    for (const char* threshold : {"99", "1", "0.5"}) {
        INFO(threshold);
        const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " +
                                    quoted(shop().held_out) + " --relevance-threshold " + threshold);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("outside the model's rating scale (1, 5]") != std::string::npos);
        CHECK(r.out.find("nan") == std::string::npos);
    }
}

TEST_CASE("evaluate warns when ratings lie outside the model's scale") {
    const auto dir = scratch_dir("evaluate_command_off_scale");
    const auto doubled = dir / "doubled.csv";
    {
        // The held-out rows on a 0-10 scale: every rating twice its value.
        std::ifstream in(shop().held_out);
        std::ofstream out(doubled);
        std::string line;
        std::getline(in, line);
        out << line << "\n";
        while (std::getline(in, line)) {
            std::stringstream fields(line);
            std::string customer, product, rating, rest;
            std::getline(fields, customer, ',');
            std::getline(fields, product, ',');
            std::getline(fields, rating, ',');
            std::getline(fields, rest);
            out << customer << "," << product << "," << 2 * std::stod(rating) << (rest.empty() ? "" : "," + rest) << "\n";
        }
    }
    const auto r = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " + quoted(doubled) +
                                " --scale 0:10 --no-ranking");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.err.find("lie outside the model's rating scale [1, 5]") != std::string::npos);
    const auto plain = run_credence("evaluate --model " + quoted(shop().model) + " --ratings " +
                                    quoted(shop().held_out) + " --no-ranking");
    CHECK(plain.err.find("outside the model's rating scale") == std::string::npos);
}
