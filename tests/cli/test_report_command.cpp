// Tests for cli/report_command.cpp's checks, run as a user would: the report
// never replaces the model or another input it reads, a --validation file it
// cannot score is refused (exit 1) rather than reported on, and the share of
// rejected validation rows it tolerates is its own --max-reject-fraction.
#include <catch2/catch.hpp>

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

// A short fit of a small demo export, holding 10% out (written by --holdout-out).
const ShortDemoFit& shop() {
    static const ShortDemoFit s = short_demo_fit({.scratch = "report_command"});
    return s;
}

}  // namespace

TEST_CASE("report refuses to write over the model or the validation file it reads") {
    const auto dir = scratch_dir("report_command_overwrite");
    const auto model = dir / "shop.posterior", held = dir / "held-out.csv";
    fs::copy_file(shop().model, model, fs::copy_options::overwrite_existing);
    fs::copy_file(shop().held_out, held, fs::copy_options::overwrite_existing);
    const std::string model_bytes = file_bytes(model), held_bytes = file_bytes(held);
    for (const std::string& args : {quoted(model) + " -o " + quoted(model),
                                    quoted(model) + " --validation " + quoted(held) + " -o " + quoted(held)}) {
        INFO(args);
        const auto r = run_credence("report " + args);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("writing there would replace an input") != std::string::npos);
    }
    CHECK(file_bytes(model) == model_bytes);
    CHECK(file_bytes(held) == held_bytes);
    const auto no_folder = run_credence("report " + quoted(model) + " -o " + quoted(dir / "absent" / "r.html"));
    CHECK(no_folder.exit_code == 1);
    CHECK(no_folder.err.find("does not exist") != std::string::npos);
}

TEST_CASE("report refuses a validation file it cannot score, and takes its own --max-reject-fraction") {
    const auto dir = scratch_dir("report_command_validation");
    const auto strangers = dir / "strangers.csv";
    {
        std::ofstream out(strangers);
        out << "customer_id,product_sku,stars\n";
        for (int k = 0; k < 10; ++k) out << "walk-in-" << k << ",kitchen-0001,4\n";
    }
    const auto none = run_credence("report " + quoted(shop().model) + " --validation " + quoted(strangers) + " -o " +
                                   quoted(dir / "none.html"));
    CHECK(none.exit_code == 1);
    CHECK(none.err.find("none of the 10 ratings could be scored") != std::string::npos);
    CHECK(!fs::exists(dir / "none.html"));

    // Five bad rows among about 340: over the default 1%, within 5%.
    const auto rough = dir / "rough.csv";
    fs::copy_file(shop().held_out, rough, fs::copy_options::overwrite_existing);
    {
        std::ofstream out(rough, std::ios::app);
        for (int k = 1; k <= 5; ++k) out << "c-0000" << k << ",kitchen-0001,lots\n";
    }
    const auto strict = run_credence("report " + quoted(shop().model) + " --validation " + quoted(rough) + " -o " +
                                     quoted(dir / "strict.html"));
    CHECK(strict.exit_code == 1);
    CHECK(strict.err.find("--max-reject-fraction") != std::string::npos);
    const auto tolerant = run_credence("report " + quoted(shop().model) + " --validation " + quoted(rough) +
                                       " --max-reject-fraction 0.05 -o " + quoted(dir / "tolerant.html"));
    INFO(tolerant.err);
    CHECK(tolerant.exit_code == 0);
    CHECK(tolerant.err.find("rejected 5") != std::string::npos);
    CHECK(fs::exists(dir / "tolerant.html"));
}
