// End-to-end tests of the `credence` program: the analyst's path from a
// ratings export to a posterior file, offline answers and evaluation, with
// bad input handled by clear messages and exit codes.
#include <catch2/catch.hpp>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <string>
#include <tuple>
#include <utility>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/assess/compare.hpp"
#include "model/fit/sampler.hpp"
#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

// One demo-shop export and one fit shared by the cases below (fitting is the slow part).
struct DemoFit {
    fs::path dir, ratings, model;
    CommandResult fit;
};

const DemoFit& demo_fit() {
    static DemoFit d = [] {
        DemoFit x;
        x.dir = scratch_dir("cli");
        const auto gen = run_credence("demo-data --out-dir " + quoted(x.dir) + " --customers 300 --products 80 --seed 11");
        REQUIRE(gen.exit_code == 0);
        x.ratings = x.dir / "ratings.csv";
        x.model = x.dir / "shop.posterior";
        x.fit = run_credence("fit --ratings " + quoted(x.ratings) + " --scale 1:5 --out " + quoted(x.model) +
                             " --rank 4 --burn-in 40 --samples 20 --thin 1 --chains 2 --seed 3 --holdout 0.1");
        return x;
    }();
    return d;
}

// One option as `credence <command> --help` prints it (CLI11's layout):
//   "  --name TYPE=DEFAULT   description", the description on the next line
// when the left part is wide.
struct HelpEntry {
    std::string head;          // name and type, default removed
    std::string default_text;  // after '=', empty when none is shown
    std::string description;
};

// The options of one help section ("Options", "Sampler"), by long name.
std::map<std::string, HelpEntry> help_section(const std::string& help, const std::string& section) {
    std::map<std::string, HelpEntry> entries;
    std::istringstream in(help);
    std::string line;
    while (std::getline(in, line) && line != section + ":") {}
    HelpEntry* last = nullptr;
    while (std::getline(in, line) && !line.empty()) {
        if (line.rfind("  -", 0) == 0) {
            const auto gap = line.find("  ", 2);
            std::string head = line.substr(2, gap == std::string::npos ? std::string::npos : gap - 2);
            HelpEntry e;
            if (const auto eq = head.rfind('='); eq != std::string::npos) {
                e.default_text = head.substr(eq + 1);
                head.erase(eq);
            }
            e.head = head;
            if (gap != std::string::npos) e.description = line.substr(line.find_first_not_of(' ', gap));
            std::string name = head.substr(0, head.find(' '));
            if (const auto comma = name.find(','); comma != std::string::npos) name.erase(0, comma + 1);
            last = &(entries[name] = e);
        } else if (last) {
            if (!last->description.empty()) last->description.push_back(' ');
            last->description.append(line, line.find_first_not_of(' '));
        }
    }
    return entries;
}

// As CLI11 shows a default (capture_default_str streams the value).
template <typename T>
std::string shown(const T& value) {
    std::ostringstream s;
    s << value;
    return s.str();
}

size_t count_lines(const fs::path& p) {
    std::ifstream in(p);
    size_t n = 0;
    for (std::string line; std::getline(in, line);) ++n;
    return n;
}

}  // namespace

TEST_CASE("fit turns a demo export into a posterior file and accounts for every row") {
    const auto& d = demo_fit();
    INFO(d.fit.err);
    REQUIRE(d.fit.exit_code == 0);
    REQUIRE(fs::exists(d.model));
    CHECK(d.fit.out.find("wrote") != std::string::npos);
    // The demo export carries three faulty rows on purpose; they land in the
    // rejects file (header + 3 lines), and the summary says so.
    CHECK(d.fit.err.find("rejected 3") != std::string::npos);
    CHECK(count_lines(d.dir / "ratings.csv.rejects.tsv") == 4);
    // stderr is not a terminal here: no progress line redraws.
    CHECK(d.fit.err.find('\r') == std::string::npos);
    CHECK(d.fit.err.find("convergence:") != std::string::npos);

    const auto p = credence::read_posterior(d.model.string());
    CHECK(p.rank == 4);
    CHECK(p.num_samples == 40);
    CHECK(p.num_chains == 2);
    CHECK(p.scale.declared);
    const auto diag = json::parse(p.diagnostics_json);
    CHECK(diag.contains("verdict"));
    CHECK(diag.contains("max_rhat"));
    const auto meta = json::parse(p.fit_metadata_json);
    CHECK(meta.at("data_fingerprint").get<std::string>().size() == 16);
    CHECK(meta.at("data").at("rejected") == 3);
    // CREDENCE_PROJECT_VERSION comes from CMake's project(VERSION), not from the program.
    CHECK(meta.at("credence_version") == CREDENCE_PROJECT_VERSION);
}

TEST_CASE("--version prints exactly the version that CMakeLists.txt declares") {
    const auto r = run_credence("--version");
    CHECK(r.exit_code == 0);
    CHECK(r.out == std::string("credence ") + CREDENCE_PROJECT_VERSION + "\n");
}

TEST_CASE("fit and compare declare the same sampler flags with the same help and their own defaults") {
    const auto fit = run_credence("fit --help");
    const auto compare = run_credence("compare --help");
    REQUIRE(fit.exit_code == 0);
    REQUIRE(compare.exit_code == 0);
    const auto in_fit = help_section(fit.out, "Sampler");
    const auto in_compare = help_section(compare.out, "Sampler");

    // Every sampler flag, with the default each command starts from:
    // FitOptions{} for fit, CompareOptions{}.fit for compare.
    const credence::FitOptions f;
    const credence::FitOptions c = credence::CompareOptions{}.fit;
    const std::vector<std::tuple<std::string, std::string, std::string>> expected = {
        {"--burn-in", shown(f.burn_in), shown(c.burn_in)},
        {"--samples", shown(f.samples), shown(c.samples)},
        {"--thin", shown(f.thin), shown(c.thin)},
        {"--chains", shown(f.chains), shown(c.chains)},
        {"--seed", shown(f.seed), shown(c.seed)},
        {"--threads", shown(f.threads), shown(c.threads)},
        {"--no-biases", "", ""},
        {"--fixed-noise-precision", "", ""},
        {"--init-scale", shown(f.init_scale), shown(c.init_scale)},
        {"--prior-beta0", shown(f.prior.beta0), shown(c.prior.beta0)},
        {"--prior-nu0-minus-rank", shown(f.prior.nu0_minus_rank), shown(c.prior.nu0_minus_rank)},
        {"--prior-w0-scale", shown(f.prior.w0_scale), shown(c.prior.w0_scale)},
        {"--noise-prior-shape", shown(f.prior.noise_shape), shown(c.prior.noise_shape)},
        {"--noise-prior-rate", shown(f.prior.noise_rate), shown(c.prior.noise_rate)},
        {"--bias-prior-shape", shown(f.prior.bias_shape), shown(c.prior.bias_shape)},
        {"--bias-prior-rate", shown(f.prior.bias_rate), shown(c.prior.bias_rate)},
    };
    CHECK(in_fit.size() == expected.size());
    CHECK(in_compare.size() == expected.size());
    for (const auto& [name, fit_default, compare_default] : expected) {
        INFO(name);
        REQUIRE(in_fit.count(name) == 1);
        REQUIRE(in_compare.count(name) == 1);
        const HelpEntry& a = in_fit.at(name);
        const HelpEntry& b = in_compare.at(name);
        CHECK(a.head == b.head);
        CHECK(a.description == b.description);
        CHECK_FALSE(a.description.empty());
        CHECK(a.default_text == fit_default);
        CHECK(b.default_text == compare_default);
    }
    // The rank: one for fit (default from FitOptions), several for compare.
    const auto fit_options = help_section(fit.out, "Options");
    REQUIRE(fit_options.count("--rank") == 1);
    CHECK(fit_options.at("--rank").default_text == shown(f.rank));
    const auto compare_options = help_section(compare.out, "Options");
    CHECK(compare_options.count("--rank") == 0);
    REQUIRE(compare_options.count("--ranks") == 1);
}

TEST_CASE("every sampler flag of fit reaches the sampler") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-sampler-flags");
    const auto model = dir / "flags.posterior";
    const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 -q --out " + quoted(model) +
                                " --rank 3 --burn-in 7 --samples 5 --thin 3 --chains 3 --seed 21 --threads 1"
                                " --no-biases --fixed-noise-precision 3.5 --init-scale 0.25 --prior-beta0 1.5"
                                " --prior-nu0-minus-rank 2 --prior-w0-scale 0.5 --noise-prior-shape 2.5"
                                " --noise-prior-rate 0.75 --bias-prior-shape 3 --bias-prior-rate 4");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    const auto o = json::parse(credence::read_posterior(model.string()).fit_metadata_json).at("options");
    CHECK(o.at("rank") == 3);
    CHECK(o.at("burn_in") == 7);
    CHECK(o.at("samples") == 5);
    CHECK(o.at("thin") == 3);
    CHECK(o.at("chains") == 3);
    CHECK(o.at("seed") == 21);
    CHECK(o.at("threads") == 1);
    CHECK(o.at("biases") == false);
    CHECK(o.at("sample_noise") == false);
    CHECK(o.at("fixed_noise_precision") == 3.5);
    CHECK(o.at("init_scale") == 0.25);
    const auto& p = o.at("prior");
    CHECK(p.at("beta0") == 1.5);
    CHECK(p.at("nu0_minus_rank") == 2.0);
    CHECK(p.at("w0_scale") == 0.5);
    CHECK(p.at("noise_shape") == 2.5);
    CHECK(p.at("noise_rate") == 0.75);
    CHECK(p.at("bias_shape") == 3.0);
    CHECK(p.at("bias_rate") == 4.0);
}

TEST_CASE("sampler flags outside their range are refused before any work") {
    const auto dir = scratch_dir("cli-sampler-ranges");
    for (const char* bad : {"--samples 0", "--thin 0", "--chains 65", "--prior-beta0 0", "--prior-w0-scale inf",
                            "--prior-nu0-minus-rank -1", "--noise-prior-rate -2", "--init-scale nan"}) {
        INFO(bad);
        const auto r = run_credence("fit --ratings " + quoted(dir / "missing.csv") + " --out " +
                                    quoted(dir / "m.posterior") + " " + bad);
        // A usage error, neither success nor a data problem (1).
        CHECK(r.exit_code != 0);
        CHECK(r.exit_code != 1);
        // Refused while parsing: the missing ratings file was never opened.
        CHECK(r.err.find("missing.csv") == std::string::npos);
        CHECK(r.err.find(std::string(bad).substr(0, std::string(bad).find(' '))) != std::string::npos);
    }
}

TEST_CASE("compare refuses to fit both bias settings and none at once") {
    const auto dir = scratch_dir("cli-compare-biases");
    const auto r = run_credence("compare --ratings " + quoted(dir / "missing.csv") + " --with-without-biases --no-biases");
    // A usage error, neither success nor a data problem (1), found before the file is opened.
    CHECK(r.exit_code != 0);
    CHECK(r.exit_code != 1);
    CHECK(r.err.find("--with-without-biases excludes --no-biases") != std::string::npos);
}

TEST_CASE("inspect, predict and recommend answer from the file") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto ins = run_credence("inspect " + quoted(d.model));
    REQUIRE(ins.exit_code == 0);
    CHECK(ins.out.find("rank 4") != std::string::npos);

    const auto pred = run_credence("predict --model " + quoted(d.model) + " --user c-00007 --item tea-0001 --json");
    INFO(pred.err);
    REQUIRE(pred.exit_code == 0);
    const auto pj = json::parse(pred.out);
    CHECK(pj.at("lower").get<double>() <= pj.at("mean").get<double>());
    CHECK(pj.at("mean").get<double>() <= pj.at("upper").get<double>());
    CHECK(pj.at("lower").get<double>() >= 1.0);
    CHECK(pj.at("upper").get<double>() <= 5.0);
    CHECK(pj.at("sd").get<double>() > 0.0);

    const auto rec = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 -n 5 --rank-by lower --json");
    REQUIRE(rec.exit_code == 0);
    const auto rj = json::parse(rec.out);
    REQUIRE(rj.at("items").size() == 5);
    // Ranked by the lower bound: non-increasing scores.
    for (size_t k = 1; k < 5; ++k)
        CHECK(rj["items"][k - 1]["score"].get<double>() >= rj["items"][k]["score"].get<double>());
    // Items the customer rated in training are excluded by default.
    const auto p = credence::read_posterior(d.model.string());
    uint32_t u = 0;
    while (p.user_ids[u] != "c-00007") ++u;
    for (const auto& item : rj["items"])
        for (uint32_t i : p.rated_by(u)) CHECK(p.item_ids[i] != item["item"].get<std::string>());
}

TEST_CASE("evaluate --json carries the documented keys") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto ev = run_credence("evaluate --model " + quoted(d.model) + " --ratings " + quoted(d.ratings) +
                                 " --scale 1:5 --json --rejects-path " + quoted(d.dir / "eval-rejects.tsv"));
    INFO(ev.err);
    REQUIRE(ev.exit_code == 0);
    const auto j = json::parse(ev.out);
    for (const char* key : {"rmse", "mae", "mean_log_predictive_density", "coverage", "rated", "unknown_users", "unknown_items"})
        CHECK(j.contains(key));
    for (const char* level : {"0.5", "0.8", "0.9", "0.95"}) CHECK(j["coverage"].contains(level));
    CHECK(j["rated"].get<uint64_t>() > 1000);
    // Stars are integers 1..5 and the model predicts better than the spread of the data.
    CHECK(j["rmse"].get<double>() < 1.2);
}

TEST_CASE("bad input gives an actionable message and a failing exit code") {
    const auto dir = scratch_dir("cli-errors");
    SECTION("too many rejected rows stop the fit") {
        std::ofstream(dir / "bad.csv") << "customer,sku,stars\nc1,a,5\nc2,b,x\nc3,c,4\nc4,d,3\n";
        const auto r = run_credence("fit --ratings " + quoted(dir / "bad.csv") + " --out " + quoted(dir / "m.posterior"));
        CHECK(r.exit_code == 1);
        CHECK(r.err.find("--max-reject-fraction") != std::string::npos);
        CHECK_FALSE(fs::exists(dir / "m.posterior"));
    }
    SECTION("a corrupt posterior file is refused, not crashed on") {
        const auto& d = demo_fit();
        REQUIRE(d.fit.exit_code == 0);
        fs::copy_file(d.model, dir / "broken.posterior", fs::copy_options::overwrite_existing);
        {
            std::fstream f(dir / "broken.posterior", std::ios::in | std::ios::out | std::ios::binary);
            f.seekp(static_cast<std::streamoff>(fs::file_size(dir / "broken.posterior") / 2));
            f.put('\x5a');
        }
        const auto r = run_credence("inspect " + quoted(dir / "broken.posterior"));
        CHECK(r.exit_code == 1);
        CHECK(r.err.find("broken.posterior") != std::string::npos);
    }
    SECTION("an unknown customer is named") {
        const auto& d = demo_fit();
        REQUIRE(d.fit.exit_code == 0);
        const auto r = run_credence("predict --model " + quoted(d.model) + " --user nobody --item tea-0001");
        CHECK(r.exit_code == 1);
        CHECK(r.err.find("'nobody'") != std::string::npos);
    }
    SECTION("holdout and validation together are refused as usage") {
        const auto& d = demo_fit();
        const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --out " + quoted(dir / "x.posterior") +
                                    " --holdout 0.1 --validation " + quoted(d.ratings));
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("--holdout") != std::string::npos);
    }
}

TEST_CASE("columns are chosen with --customer-column and --product-column") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-columns");
    // Roles swapped on purpose: the products become the "customers" of this model.
    const auto model = dir / "swapped.posterior";
    const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 -q --rejects-path " +
                                quoted(dir / "rejects.tsv") + " --out " + quoted(model) +
                                " --customer-column product_sku --product-column 0 --rating-column stars"
                                " --timestamp-column rated_at --rank 2 --burn-in 4 --samples 4 --chains 2");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    const auto p = credence::read_posterior(model.string());
    CHECK(std::find(p.user_ids.begin(), p.user_ids.end(), "tea-0001") != p.user_ids.end());
    CHECK(std::find(p.item_ids.begin(), p.item_ids.end(), "c-00007") != p.item_ids.end());
}

TEST_CASE("the old column flags are refused as usage errors that name the new ones") {
    const auto dir = scratch_dir("cli-renamed");
    const std::string file = quoted(dir / "ratings.csv");
    std::ofstream(dir / "m.posterior") << "";  // evaluate checks that --model exists while parsing
    for (const std::string& command : {"fit --out " + quoted(dir / "m.posterior"),
                                      "evaluate --model " + quoted(dir / "m.posterior"), std::string("compare")}) {
        for (const auto& [old_flag, new_flag] : {std::pair{"--user-column", "--customer-column"},
                                                 std::pair{"--item-column", "--product-column"}}) {
            for (const char* value : {" 0", "=customer_id", ""}) {
                const auto r = run_credence(command + " --ratings " + file + " " + old_flag + value);
                INFO(command << " " << old_flag << value << "\n" << r.err);
                CHECK(r.exit_code == 2);
                CHECK(r.err.find(std::string(old_flag) + " is now " + new_flag) != std::string::npos);
            }
        }
    }
}

TEST_CASE("the same seed gives the same samples with one thread or two") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-threads");
    std::string common = "fit --ratings " + quoted(d.ratings) + " --scale 1:5 --rank 3 --burn-in 5 --samples 3 --chains 2 --seed 9 -q";
    REQUIRE(run_credence(common + " --threads 1 --out " + quoted(dir / "one.posterior")).exit_code == 0);
    REQUIRE(run_credence(common + " --threads 2 --out " + quoted(dir / "two.posterior")).exit_code == 0);
    const auto a = credence::read_posterior((dir / "one.posterior").string());
    const auto b = credence::read_posterior((dir / "two.posterior").string());
    CHECK(a.user_factors == b.user_factors);
    CHECK(a.item_factors == b.item_factors);
    CHECK(a.noise_precision == b.noise_precision);
}
