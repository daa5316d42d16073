// Tests for --rejects-path as the program handles it (cli/ingest_flags.cpp,
// model/data/ingest.cpp): it never names a file away. The ratings file
// itself is a usage error (exit 2), any other file that is not a rejects
// file (a model, a note) is refused with exit 1, and both stay byte for
// byte; a rejects file of an earlier run is replaced or removed as before.
#include <catch2/catch.hpp>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "tests/support/demo_fit.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence::testing;
namespace fs = std::filesystem;

namespace {

// A small demo export (three faulty rows in it on purpose), a short fit and
// its held-out rows (a clean file).
const ShortDemoFit& shop() {
    static const ShortDemoFit s = short_demo_fit({.scratch = "rejects_path", .customers = 120, .products = 40,
                                                  .data_seed = 5, .rank = 2, .burn_in = 10, .samples = 5,
                                                  .held_out_name = "clean.csv"});
    return s;
}

std::string evaluate(const fs::path& ratings, const fs::path& rejects) {
    return "evaluate --model " + quoted(shop().model) + " --ratings " + quoted(ratings) + " --no-ranking --rejects-path " +
           quoted(rejects);
}

}  // namespace

TEST_CASE("--rejects-path naming the ratings file is a usage error, by any name, and the ratings stay") {
    const auto& s = shop();
    const std::string clean = file_bytes(s.held_out);
    REQUIRE(!clean.empty());
    const auto link = s.dir / "clean-link.csv";
    fs::remove(link);
    fs::create_symlink(s.held_out.filename(), link);
    for (const fs::path& rejects : {s.held_out, link, s.dir / "." / s.held_out.filename()}) {
        INFO(rejects);
        const auto r = run_credence(evaluate(s.held_out, rejects));
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("--rejects-path") != std::string::npos);
        CHECK(r.err.find("is the ratings file") != std::string::npos);
        CHECK(r.err.find("removed") == std::string::npos);
        CHECK(file_bytes(s.held_out) == clean);
    }
    // With rows rejected (the demo export has three) it is refused the same way.
    const std::string ratings = file_bytes(s.ratings);
    const auto fit = run_credence("fit --ratings " + quoted(s.ratings) + " --rejects-path " + quoted(s.ratings) +
                                  " --out " + quoted(s.dir / "never.posterior"));
    CHECK(fit.exit_code == 2);
    CHECK(file_bytes(s.ratings) == ratings);
    CHECK_FALSE(fs::exists(s.dir / "never.posterior"));
}

TEST_CASE("--rejects-path naming a model or any file that is not a rejects file is refused, and the file stays") {
    const auto& s = shop();
    const std::string model = file_bytes(s.model);
    const auto notes = s.dir / "notes.txt";
    std::ofstream(notes, std::ios::binary) << "line one\nline two\n";
    for (const fs::path& input : {s.held_out, s.ratings}) {  // nothing rejected, then three rows rejected
        for (const fs::path& target : {s.model, notes}) {
            INFO(input.filename() << " with --rejects-path " << target.filename());
            const auto r = run_credence(evaluate(input, target));
            CHECK(r.exit_code == 1);
            CHECK(r.err.find("not a rejects file") != std::string::npos);
            CHECK(r.err.find("pass another --rejects-path") != std::string::npos);
        }
        CHECK(file_bytes(s.model) == model);
        CHECK(file_bytes(notes) == "line one\nline two\n");
    }
    // The model still loads.
    CHECK(run_credence("inspect " + quoted(s.model)).exit_code == 0);
}

TEST_CASE("--rejects-path naming a rejects file of an earlier run replaces it, or removes it when nothing is rejected") {
    const auto& s = shop();
    const auto rejects = s.dir / "earlier.rejects.tsv";
    std::ofstream(rejects, std::ios::binary) << "line\treason\trecord\n9\tan old reason\told,row\n";
    const auto messy = run_credence(evaluate(s.ratings, rejects));
    INFO(messy.err);
    REQUIRE(messy.exit_code == 0);
    const std::string written = file_bytes(rejects);
    CHECK(written.rfind("line\treason\trecord\n", 0) == 0);
    CHECK(written.find("an old reason") == std::string::npos);
    CHECK(std::count(written.begin(), written.end(), '\n') == 4);  // header and the demo's three faulty rows

    const auto clean = run_credence(evaluate(s.held_out, rejects));
    INFO(clean.err);
    REQUIRE(clean.exit_code == 0);
    CHECK(clean.err.find("removed " + rejects.string() + ": a rejects file from an earlier run") != std::string::npos);
    CHECK_FALSE(fs::exists(rejects));
}
