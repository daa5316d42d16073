// End-to-end tests of the `credence` program: the analyst's path from a
// ratings export to a posterior file, offline answers and evaluation, with
// bad input handled by clear messages and exit codes.
#include <catch2/catch.hpp>

#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <map>
#include <memory>
#include <optional>
#include <set>
#include <sstream>
#include <string>
#include <tuple>
#include <utility>
#include <vector>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "model/assess/compare.hpp"
#include "model/assess/rank_choice.hpp"
#include "model/math/cpu_level.hpp"
#include "model/fit/sampler.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/predict.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"
#include "tests/support/server_process.hpp"

using namespace credence::testing;
using credence::cpu_level_description;
using credence::cpu_level_name;
using credence::CpuLevel;
using credence::detected_cpu_level;
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
        x.fit = run_credence("fit --ratings " + quoted(x.ratings) + " --catalogue " + quoted(x.dir / "catalogue.csv") +
                             " --scale 1:5 --out " + quoted(x.model) +
                             " --rank 4 --run-length fixed --burn-in 40 --samples 20 --thin 1 --chains 2 --seed 3 --holdout 0.1");
        return x;
    }();
    return d;
}

// One shell word for a command line (quoted() takes paths; a plain string
// would pick std::quoted).
std::string word(const std::string& text) { return quoted(fs::path(text)); }

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

// The subcommands `credence --help` lists, in its order.
std::vector<std::string> subcommands_from_help() {
    const auto help = run_credence("--help");
    REQUIRE(help.exit_code == 0);
    std::vector<std::string> names;
    std::istringstream in(help.out);
    std::string line;
    while (std::getline(in, line) && line != "Subcommands:") {}
    while (std::getline(in, line) && !line.empty()) {
        std::istringstream words(line);
        std::string name;
        words >> name;
        names.push_back(name);
    }
    REQUIRE(!names.empty());
    return names;
}

// The long option names in a help text: the first "--name" of each entry line.
std::set<std::string> long_options(const std::string& help) {
    std::set<std::string> names;
    std::istringstream in(help);
    for (std::string line; std::getline(in, line);) {
        if (line.rfind("  -", 0) != 0) continue;
        const auto at = line.find("--");
        if (at == std::string::npos) continue;
        const auto end = line.find_first_of(" =,", at);
        names.insert(line.substr(at, end == std::string::npos ? std::string::npos : end - at));
    }
    return names;
}

// A gzip-compressed man page as roff text, with roff's escaped hyphens ("\-") as "-".
std::string man_page_text(const fs::path& page) {
    std::string text;
    // Built with append: GCC 12 warns falsely (-Wrestrict) on "literal" + string.
    std::string command = "gzip -dc ";
    command.append(quoted(page));
    FILE* pipe = popen(command.c_str(), "r");
    REQUIRE(pipe);
    char buffer[4096];
    for (size_t got; (got = fread(buffer, 1, sizeof buffer, pipe)) > 0;) text.append(buffer, got);
    REQUIRE(pclose(pipe) == 0);
    std::string unescaped;
    for (size_t k = 0; k < text.size(); ++k) {
        if (text[k] == '\\' && k + 1 < text.size() && text[k + 1] == '-') continue;  // "\-" -> "-"
        unescaped.push_back(text[k]);
    }
    return unescaped;
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

TEST_CASE("fit --catalogue stores each product's name and category, and recommend shows the names") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    // The catalogue as demo-data wrote it, read here line by line (no quoted
    // commas in ids or categories; a name may be quoted).
    std::map<std::string, std::pair<std::string, std::string>> listed;
    std::ifstream in(d.dir / "catalogue.csv");
    std::string line;
    std::getline(in, line);  // header
    while (std::getline(in, line)) {
        const auto first = line.find(','), last = line.rfind(',');
        std::string name = line.substr(first + 1, last - first - 1);
        if (name.size() >= 2 && name.front() == '"') name = name.substr(1, name.size() - 2);
        listed[line.substr(0, first)] = {name, line.substr(last + 1)};
    }
    REQUIRE(listed.size() == 80);
    const auto p = credence::read_posterior(d.model.string());
    REQUIRE(p.has_catalogue());
    for (uint32_t i = 0; i < p.num_items; ++i) {
        INFO(p.item_ids[i]);
        REQUIRE(listed.count(p.item_ids[i]) == 1);
        CHECK(p.item_name(i) == listed[p.item_ids[i]].first);
        CHECK(p.item_category(i) == listed[p.item_ids[i]].second);
    }
    const auto meta = json::parse(p.fit_metadata_json);
    CHECK(meta.at("catalogue").at("rows_read") == 80);
    CHECK(meta.at("catalogue").at("kept") == 80);
    CHECK(meta.at("catalogue").at("products_named") == p.num_items);

    const auto text = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 -n 3");
    REQUIRE(text.exit_code == 0);
    const auto js = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 -n 3 --json");
    REQUIRE(js.exit_code == 0);
    const auto items = json::parse(js.out).at("items");
    REQUIRE(items.size() == 3);
    for (const auto& item : items) {
        const std::string id = item.at("item");
        CHECK(item.at("name") == listed[id].first);
        CHECK(item.at("category") == listed[id].second);
        CHECK(text.out.find(listed[id].first) != std::string::npos);
    }
}

TEST_CASE("recommend --category keeps to one category and every entry says why") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto p = credence::read_posterior(d.model.string());
    REQUIRE(p.has_catalogue());
    const std::string category = p.item_category(0);
    const auto js = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 -n 4 --json --category " +
                                 word(category));
    INFO(js.err);
    REQUIRE(js.exit_code == 0);
    const auto items = json::parse(js.out).at("items");
    REQUIRE(!items.empty());
    for (const auto& item : items) {
        CHECK(item.at("category") == category);
        CHECK(item.at("why").at("rating_count").get<uint32_t>() > 0);
        for (const auto& s : item.at("why").at("similar_rated")) CHECK(s.at("similarity").get<double>() > 0.0);
    }
    const auto text = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 -n 2 --category " +
                                   word(category));
    REQUIRE(text.exit_code == 0);
    CHECK(text.out.find("why: ") != std::string::npos);
    CHECK(text.out.find(" ratings in training") != std::string::npos);
    const auto unknown = run_credence("recommend --model " + quoted(d.model) + " --user c-00007 --category lighting");
    CHECK(unknown.exit_code == 2);
    CHECK(unknown.err.find(category) != std::string::npos);  // the known categories are listed
}

TEST_CASE("inspect --json prints the model summary: data size, convergence, validation and sampled noise") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto r = run_credence("inspect --json " + quoted(d.model));
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    const auto j = json::parse(r.out);
    const auto p = credence::read_posterior(d.model.string());
    CHECK(j.at("data").at("customers") == p.num_users);
    CHECK(j.at("data").at("products") == p.num_items);
    CHECK(j.at("data").at("ratings") == p.rated_items.size());
    CHECK(j.at("rank") == 4);
    CHECK(j.at("chains") == 2);
    CHECK(j.at("samples") == p.num_samples);
    CHECK(j.at("fit").at("seed") == 3);
    CHECK(j.at("fit").at("created_at").get<std::string>().size() == 20);  // 2026-12-03T23:47:03Z
    CHECK(j.at("validation").at("kind") == "holdout");
    CHECK(j.at("convergence").at("worst").size() == 3);
    // The noise was sampled: its posterior mean sd, never a fixed precision.
    CHECK(j.at("noise").at("sampled") == true);
    CHECK_FALSE(j.at("noise").contains("precision"));
    double sd = 0;
    for (float tau : p.noise_precision) sd += 1.0 / std::sqrt(double(tau)) / p.noise_precision.size();
    CHECK(j.at("noise").at("sd_posterior_mean").get<double>() == Approx(sd).epsilon(1e-12));
    // Short: no per-sweep trace, no customer id.
    CHECK(r.out.size() < 4000);
    for (const auto& id : p.user_ids) CHECK(r.out.find("\"" + id) == std::string::npos);
}

TEST_CASE("--version prints exactly the version that CMakeLists.txt declares and the kernels' CPU level") {
    const auto r = run_credence("--version");
    CHECK(r.exit_code == 0);
    const std::string level = cpu_level_description();
    CHECK(r.out == std::string("credence ") + CREDENCE_PROJECT_VERSION + "\nkernels: " + level + "\n");
}

TEST_CASE("CREDENCE_CPU_LEVEL lowers the kernels' level, and a level the CPU cannot run is a usage error") {
    const auto baseline = run_credence_with_env("CREDENCE_CPU_LEVEL=x86-64", "--version");
    CHECK(baseline.exit_code == 0);
    const std::string detected = cpu_level_name(detected_cpu_level());
    const std::string expected = detected_cpu_level() == CpuLevel::baseline
                                     ? "kernels: x86-64 (detected x86-64)"
                                     : "kernels: x86-64 (detected " + detected + ", capped by CREDENCE_CPU_LEVEL)";
    CHECK(baseline.out.find(expected) != std::string::npos);
    const auto unknown = run_credence_with_env("CREDENCE_CPU_LEVEL=x86-64-v9", "--version");
    CHECK(unknown.exit_code == 2);
    CHECK(unknown.err.find("CREDENCE_CPU_LEVEL='x86-64-v9' names no CPU level") != std::string::npos);
    if (detected_cpu_level() < CpuLevel::v4) {
        const auto above = run_credence_with_env("CREDENCE_CPU_LEVEL=x86-64-v4", "--version");
        CHECK(above.exit_code == 2);
        CHECK(above.err.find("is above what this CPU runs") != std::string::npos);
    }
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
    auto length = [](const credence::FitOptions& o) {
        return std::string(o.run_length == credence::RunLength::converged ? "converged" : "fixed");
    };
    const std::vector<std::tuple<std::string, std::string, std::string>> expected = {
        {"--run-length", length(f), length(c)},
        {"--max-sweeps", shown(f.max_sweeps), shown(c.max_sweeps)},
        {"--time-limit", "0", "0"},
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
    // The rank: one for fit (auto by default, choosing among
    // RankChoiceOptions{}'s candidates), several for compare.
    const auto fit_options = help_section(fit.out, "Options");
    REQUIRE(fit_options.count("--rank") == 1);
    CHECK(fit_options.at("--rank").default_text == "auto");
    REQUIRE(fit_options.count("--auto-ranks") == 1);
    std::string candidates;
    for (uint32_t r : credence::RankChoiceOptions{}.candidates) {
        if (!candidates.empty()) candidates += ',';
        candidates += shown(r);
    }
    CHECK(fit_options.at("--auto-ranks").default_text == candidates);
    const auto compare_options = help_section(compare.out, "Options");
    CHECK(compare_options.count("--rank") == 0);
    CHECK(compare_options.count("--auto-ranks") == 0);
    REQUIRE(compare_options.count("--ranks") == 1);
}

TEST_CASE("every sampler flag of fit reaches the sampler") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-sampler-flags");
    const auto model = dir / "flags.posterior";
    const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 -q --out " + quoted(model) +
                                " --rank 3 --run-length fixed --burn-in 7 --samples 5 --thin 3 --chains 3 --seed 21 --threads 1"
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
    // Ranked by the lower bound: non-increasing ranked values, which are the lower bounds shown.
    for (size_t k = 1; k < 5; ++k)
        CHECK(rj["items"][k - 1]["rank_value_unclipped"].get<double>() >=
              rj["items"][k]["rank_value_unclipped"].get<double>());
    for (const auto& item : rj["items"]) CHECK(item["rank_value"] == item["lower"]);
    // Items the customer rated in training are excluded by default.
    const auto p = credence::read_posterior(d.model.string());
    uint32_t u = 0;
    while (p.user_ids[u] != "c-00007") ++u;
    for (const auto& item : rj["items"])
        for (uint32_t i : p.rated_by(u)) CHECK(p.item_ids[i] != item["item"].get<std::string>());
}

TEST_CASE("recommend --rated folds in a visitor exactly as the server and the offline engine do") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    auto posterior = std::make_shared<const credence::Posterior>(credence::read_posterior(d.model.string()));
    const auto& ids = posterior->item_ids;
    // Three products the visitor rated, by index into the model and by id.
    const std::vector<credence::VisitorRating> ratings = {{3, 5.0}, {17, 1.5}, {40, 4.0}};
    std::string rated_flags;
    json server_ratings = json::array();
    for (const auto& r : ratings) {
        rated_flags += " --rated " + word(ids[r.item] + "=" + fmt::format("{}", r.rating));
        server_ratings.push_back({{"item", ids[r.item]}, {"rating", r.rating}});
    }
    const credence::PredictionEngine engine(posterior);
    ServerProcess server(scratch_dir("cli-foldin-server"), d.model);
    auto client = server.client();
    for (const char* rank_by : {"lower", "draw"}) {
        INFO("--rank-by " << rank_by);
        const auto cli = run_credence("recommend --model " + quoted(d.model) + rated_flags + " -n 6 --rank-by " +
                                      rank_by + " --seed 4242 --json");
        INFO(cli.err);
        REQUIRE(cli.exit_code == 0);
        const auto got = json::parse(cli.out);
        CHECK(got.at("rated") == 3);
        // As the server: only a draw ranking carries its seed, as a string.
        if (std::string(rank_by) == "draw") {
            CHECK(got.at("seed") == "4242");
        } else {
            CHECK_FALSE(got.contains("seed"));
        }
        const auto& items = got.at("items");
        REQUIRE(items.size() == 6);

        // Offline: the same model function on the same file, ratings and seed.
        const credence::RecommendOptions options{
            .n = 6,
            .rank_by = std::string(rank_by) == "draw" ? credence::RankBy::draw : credence::RankBy::lower,
            .candidates = std::nullopt,
            .draw_seed = 4242};
        const auto want = credence::recommend_for_visitor(engine, ratings, options);
        REQUIRE(want.size() == 6);
        for (size_t k = 0; k < want.size(); ++k) {
            INFO("position " << k);
            CHECK(items[k].at("item") == ids[want[k].item]);
            // JSON numbers round-trip doubles exactly, so equality is bitwise.
            CHECK(items[k].at("rank_value_unclipped").get<double>() == want[k].score);
            CHECK(items[k].at("rank_value").get<double>() == want[k].rank_value);
            CHECK(items[k].at("mean").get<double>() == want[k].prediction.mean);
            CHECK(items[k].at("sd").get<double>() == want[k].prediction.sd);
            CHECK(items[k].at("lower").get<double>() == want[k].prediction.lower);
            CHECK(items[k].at("upper").get<double>() == want[k].prediction.upper);
        }

        // The server: POST /v1/recommendations with the same ratings and seed.
        const json request = {{"ratings", server_ratings}, {"n", 6}, {"rank_by", rank_by}, {"seed", "4242"}};
        const auto answer = client->Post("/v1/recommendations", request.dump(), "application/json");
        REQUIRE(answer);
        INFO(answer->body);
        REQUIRE(answer->status == 200);
        const auto served = json::parse(answer->body);
        REQUIRE(served.at("items").size() == items.size());
        for (size_t k = 0; k < items.size(); ++k) {
            INFO("position " << k);
            for (const char* key : {"item", "name", "rank_value", "rank_value_unclipped", "mean", "sd", "lower", "upper", "why"})
                CHECK(served.at("items")[k].at(key) == items[k].at(key));
        }
        CHECK(served.contains("seed") == got.contains("seed"));
        if (got.contains("seed")) CHECK(served.at("seed") == got.at("seed"));
    }

    // Deterministic: without --seed, two runs print the same bytes.
    const std::string plain = "recommend --model " + quoted(d.model) + rated_flags + " -n 6 --rank-by upper --json";
    const auto first = run_credence(plain), second = run_credence(plain);
    REQUIRE(first.exit_code == 0);
    CHECK(first.out == second.out);

    // The text form names the visitor and lists the same products in order.
    const auto text = run_credence("recommend --model " + quoted(d.model) + rated_flags + " -n 6 --rank-by lower");
    REQUIRE(text.exit_code == 0);
    CHECK(text.out.find("a visitor with 3 rating(s)") != std::string::npos);
    const auto listed = json::parse(
        run_credence("recommend --model " + quoted(d.model) + rated_flags + " -n 6 --rank-by lower --json").out);
    size_t at = 0;
    for (const auto& item : listed.at("items")) {
        at = text.out.find(item.at("item").get<std::string>(), at);
        CHECK(at != std::string::npos);
    }
}

TEST_CASE("recommend needs exactly one of --user and --rated, and checks the ratings") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const std::string base = "recommend --model " + quoted(d.model);
    const auto p = credence::read_posterior(d.model.string());
    const std::string item = p.item_ids[0];
    SECTION("neither is a usage error naming both") {
        const auto r = run_credence(base);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("--user") != std::string::npos);
        CHECK(r.err.find("--rated") != std::string::npos);
    }
    SECTION("both is a usage error naming both") {
        const auto r = run_credence(base + " --user " + word(p.user_ids[0]) + " --rated " + word(item + "=4"));
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("--user") != std::string::npos);
        CHECK(r.err.find("--rated") != std::string::npos);
    }
    SECTION("a rating that is not PRODUCT=STARS is a usage error") {
        for (const std::string& bad : std::vector<std::string>{item, item + "=", item + "=four", "=4"}) {
            const auto r = run_credence(base + " --rated " + word(bad));
            INFO(bad << ": " << r.err);
            CHECK(r.exit_code == 2);
            CHECK(r.err.find("--rated") != std::string::npos);
        }
    }
    SECTION("an unknown product, a repeated product or stars off the scale are data errors") {
        const auto ghost = run_credence(base + " --rated no-such-product=4");
        CHECK(ghost.exit_code == 1);
        CHECK(ghost.err.find("'no-such-product'") != std::string::npos);
        const auto twice = run_credence(base + " --rated " + word(item + "=4") + " --rated " + word(item + "=2"));
        CHECK(twice.exit_code == 1);
        CHECK(twice.err.find("twice") != std::string::npos);
        const auto high = run_credence(base + " --rated " + word(item + "=9"));
        CHECK(high.exit_code == 1);
        CHECK(high.err.find("scale") != std::string::npos);
    }
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

TEST_CASE("fit learns it cannot write --out before sampling, and cleans up after a killed fit") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-fit-out");
    // A burn-in that would take minutes: the answer must come before it.
    const auto start = std::chrono::steady_clock::now();
    const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 --run-length fixed --burn-in 1000000 --out " +
                                quoted(dir / "missing-dir" / "shop.posterior"));
    const double seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
    CHECK(r.exit_code == 1);
    CHECK(r.err.find("missing-dir") != std::string::npos);
    CHECK(r.err.find("choose another --out") != std::string::npos);
    CHECK(seconds < 10.0);

    // A temporary file that a killed fit left (its process is gone) is removed and reported.
    const pid_t child = fork();
    if (child == 0) _exit(0);
    waitpid(child, nullptr, 0);
    const auto stale = dir / (".shop.posterior.tmp-" + std::to_string(child) + "-0");
    std::ofstream(stale) << std::string(4096, 'x');
    const auto fit = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 --out " +
                                  quoted(dir / "shop.posterior") + " --rank 2 --run-length fixed --burn-in 4 --samples 4 --chains 1");
    CHECK(fit.exit_code == 0);
    CHECK_FALSE(fs::exists(stale));
    CHECK(fit.err.find("removed " + stale.string() + " (4096 bytes)") != std::string::npos);
}

TEST_CASE("exit codes follow the error taxonomy: 0 ok, 1 data or file, 2 usage") {
    // The codes are listed in cli/main.cpp. 70 (internal error) is only ever
    // the result of a bug, so no well-formed command line can reach it.
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-exit-codes");
    const std::string model = quoted(d.model), ratings = quoted(d.ratings);

    SECTION("an unknown flag is a usage error for every subcommand, and CLI11's message names it") {
        // Each command line is otherwise complete, so the unknown flag is the only problem.
        const std::vector<std::string> commands = {
            "fit --ratings " + ratings + " --out " + quoted(dir / "never.posterior"),
            "evaluate --model " + model + " --ratings " + ratings,
            "predict --model " + model + " --user c-00007 --item tea-0001",
            "recommend --model " + model + " --user c-00007",
            "inspect " + model,
            "serve --model " + model,
            "demo-data --out-dir " + quoted(dir / "never"),
            "compare --ratings " + ratings,
            "report " + model + " --out " + quoted(dir / "never.html"),
        };
        for (const auto& command : commands) {
            const auto r = run_credence(command + " --no-such-flag");
            INFO(command << "\n" << r.err);
            CHECK(r.exit_code == 2);
            CHECK(r.err.find("--no-such-flag") != std::string::npos);
        }
        CHECK_FALSE(fs::exists(dir / "never.posterior"));
        CHECK_FALSE(fs::exists(dir / "never"));
        CHECK_FALSE(fs::exists(dir / "never.html"));
    }
    SECTION("a word that is not a subcommand is named, with the list of subcommands") {
        const auto r = run_credence("bogus --ratings x.csv");
        INFO(r.err);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("'bogus' is not a subcommand") != std::string::npos);
        for (const char* sub : {"fit", "evaluate", "predict", "recommend", "inspect", "serve", "demo-data", "compare",
                                "report"})
            CHECK(r.err.find(sub) != std::string::npos);
        const auto none = run_credence("");
        CHECK(none.exit_code == 2);
        CHECK(none.err.find("give a subcommand") != std::string::npos);
        const auto flag_first = run_credence("--ratings x.csv fit");
        CHECK(flag_first.exit_code == 2);
        CHECK(flag_first.err.find("--ratings is not an option of credence itself; give a subcommand first") !=
              std::string::npos);
    }
    SECTION("an impossible option value is a usage error naming the option") {
        const auto r = run_credence("fit --ratings " + ratings + " --out " + quoted(dir / "never.posterior") + " --rank 0");
        INFO(r.err);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("--rank") != std::string::npos);
        CHECK_FALSE(fs::exists(dir / "never.posterior"));
        // Past the parser: the library's OptionError is a usage error too.
        const auto t = run_credence("evaluate --model " + model + " --ratings " + ratings +
                                    " --scale 1:5 --relevance-threshold nan --rejects-path " +
                                    quoted(dir / "rejects.tsv"));
        INFO(t.err);
        CHECK(t.exit_code == 2);
        CHECK(t.err.find("--relevance-threshold must be a finite rating value") != std::string::npos);
    }
    SECTION("a data or file problem exits 1 and names the file") {
        const auto missing = run_credence("fit --ratings " + quoted(dir / "absent.csv") + " --out " +
                                          quoted(dir / "never.posterior"));
        INFO(missing.err);
        CHECK(missing.exit_code == 1);
        CHECK(missing.err.find("cannot open") != std::string::npos);
        CHECK(missing.err.find("absent.csv") != std::string::npos);
        const auto unwritable = run_credence("report " + model + " --out " + quoted(dir / "no-such-dir" / "r.html"));
        INFO(unwritable.err);
        CHECK(unwritable.exit_code == 1);
        CHECK(unwritable.err.find("no-such-dir does not exist") != std::string::npos);
        CHECK(unwritable.err.find("r.html") != std::string::npos);
    }
    SECTION("a file that is missing or cannot be written exits 1 for every subcommand, and names it") {
        const std::string missing_model = quoted(dir / "missing.posterior");
        const std::string missing_ratings = quoted(dir / "missing.csv");
        // Each subcommand's command line, and the file its message must name.
        const std::map<std::string, std::pair<std::string, std::string>> commands = {
            {"fit", {"fit --ratings " + missing_ratings + " --out " + quoted(dir / "never.posterior"), "missing.csv"}},
            {"evaluate", {"evaluate --model " + missing_model + " --ratings " + ratings, "missing.posterior"}},
            {"predict", {"predict --model " + missing_model + " --user c-00007 --item tea-0001", "missing.posterior"}},
            {"recommend", {"recommend --model " + missing_model + " --user c-00007", "missing.posterior"}},
            {"inspect", {"inspect " + missing_model, "missing.posterior"}},
            {"serve", {"serve --config " + quoted(dir / "missing.toml") + " --model " + model, "missing.toml"}},
            {"demo-data", {"demo-data --out-dir " + quoted(dir / "a-file.csv" / "shop"), "a-file.csv"}},
            {"compare", {"compare --ratings " + missing_ratings, "missing.csv"}},
            {"report", {"report " + missing_model + " --out " + quoted(dir / "never.html"), "missing.posterior"}},
            {"forget", {"forget --ratings " + missing_ratings + " --customer c-00007", "missing.csv"}},
            {"delta", {"delta " + missing_model + " " + model, "missing.posterior"}},
        };
        std::ofstream(dir / "a-file.csv") << "customer,sku,stars\n";  // not a folder to write into
        for (const auto& sub : subcommands_from_help()) {
            INFO(sub);
            REQUIRE(commands.count(sub) == 1);  // every subcommand is covered
            const auto& [command, named] = commands.at(sub);
            const auto r = run_credence(command);
            INFO(r.err);
            CHECK(r.exit_code == 1);
            CHECK(r.err.find(named) != std::string::npos);
        }
        // Served: a model that cannot be read stops serve with 1 too.
        const auto serve = run_credence("serve --port 0 --model " + missing_model);
        INFO(serve.err);
        CHECK(serve.exit_code == 1);
        CHECK(serve.err.find("missing.posterior") != std::string::npos);
        CHECK_FALSE(fs::exists(dir / "never.posterior"));
        CHECK_FALSE(fs::exists(dir / "never.html"));
    }
    SECTION("every subcommand's --help exits 0 and ends with the exit codes") {
        for (const auto& sub : subcommands_from_help()) {
            const auto r = run_credence(sub + " --help");
            INFO(sub << "\n" << r.err);
            CHECK(r.exit_code == 0);
            CHECK(r.out.find("Exit codes: 0 ok, 1 a problem with the data or a file, 2 usage, 3 fit --gate refused "
                             "the new model, 70 internal error") != std::string::npos);
        }
    }
    SECTION("--help and --version exit 0 and print to stdout") {
        const auto help = run_credence("--help");
        CHECK(help.exit_code == 0);
        CHECK(help.out.find("recommend") != std::string::npos);
        CHECK(help.out.find("Exit codes") != std::string::npos);
        const auto sub_help = run_credence("fit --help");
        CHECK(sub_help.exit_code == 0);
        CHECK(sub_help.out.find("--rank") != std::string::npos);
        const auto version = run_credence("--version");
        CHECK(version.exit_code == 0);
        CHECK(version.out.find(std::string("credence ") + CREDENCE_PROJECT_VERSION) != std::string::npos);
    }
}

TEST_CASE("every subcommand has a man page, written from its --help, naming every option") {
    // The build writes the pages after linking credence (cmake/man_pages.cmake).
    const fs::path man_dir = fs::path(CREDENCE_BUILD_DIR) / "man";
    const auto subcommands = subcommands_from_help();
    const std::string main_page = man_page_text(man_dir / "credence.1.gz");
    CHECK(main_page.find(".TH CREDENCE \"1\"") != std::string::npos);
    for (const auto& sub : subcommands) {
        INFO(sub);
        CHECK(main_page.find(sub) != std::string::npos);
        const fs::path page = man_dir / ("credence-" + sub + ".1.gz");
        REQUIRE(fs::exists(page));
        const std::string text = man_page_text(page);
        std::string title = "credence-" + sub;
        std::transform(title.begin(), title.end(), title.begin(), [](unsigned char c) { return std::toupper(c); });
        CHECK(text.find(".TH " + title + " \"1\"") != std::string::npos);
        CHECK(text.find(".SH NAME\ncredence-" + sub + " - ") != std::string::npos);
        CHECK(text.find(std::string("\"credence ") + CREDENCE_PROJECT_VERSION + "\"") != std::string::npos);
        CHECK(text.find("Exit codes: 0 ok") != std::string::npos);
        const auto help = run_credence(sub + " --help");
        REQUIRE(help.exit_code == 0);
        const auto options = long_options(help.out);
        CHECK(options.count("--help") == 1);
        for (const auto& option : options) {
            INFO(option);
            CHECK(text.find(option) != std::string::npos);
        }
    }
    // No page for a subcommand that does not exist.
    size_t pages = 0;
    for (const auto& entry : fs::directory_iterator(man_dir)) pages += entry.path().extension() == ".gz";
    CHECK(pages == subcommands.size() + 1);
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
                                " --timestamp-column rated_at --rank 2 --run-length fixed --burn-in 4 --samples 4 --chains 2");
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
    std::string common = "fit --ratings " + quoted(d.ratings) + " --scale 1:5 --rank 3 --run-length fixed --burn-in 5 --samples 3 --chains 2 --seed 9 -q";
    REQUIRE(run_credence(common + " --threads 1 --out " + quoted(dir / "one.posterior")).exit_code == 0);
    REQUIRE(run_credence(common + " --threads 2 --out " + quoted(dir / "two.posterior")).exit_code == 0);
    const auto a = credence::read_posterior((dir / "one.posterior").string());
    const auto b = credence::read_posterior((dir / "two.posterior").string());
    CHECK(a.user_factors == b.user_factors);
    CHECK(a.item_factors == b.item_factors);
    CHECK(a.noise_precision == b.noise_precision);
}

TEST_CASE("a fit that runs out of sweeps says which budget to raise, and following that advice converges") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto dir = scratch_dir("cli-advice");
    // Rank 3 on the small demo shop converges within about a thousand sweeps;
    // 60 is too few.
    const std::string common = "fit --ratings " + quoted(d.ratings) + " --scale 1:5 --rank 3 --samples 20 --seed 4 --out " +
                               quoted(dir / "m.posterior");
    const auto short_run = run_credence(common + " --max-sweeps 60");
    INFO(short_run.err);
    REQUIRE(short_run.exit_code == 0);
    CHECK(short_run.err.find("convergence: not_converged after 60 sweeps per chain (max_sweeps") != std::string::npos);
    const auto at = short_run.err.find("rerun with --max-sweeps ");
    REQUIRE(at != std::string::npos);
    const uint32_t advised = std::stoul(short_run.err.substr(at + std::string("rerun with --max-sweeps ").size()));
    CHECK(advised > 60);
    const auto followed = run_credence(common + " --max-sweeps " + std::to_string(advised));
    INFO(followed.err);
    REQUIRE(followed.exit_code == 0);
    CHECK(followed.err.find("convergence: converged after") != std::string::npos);
    // The verdict travels with the file.
    const auto p = credence::read_posterior((dir / "m.posterior").string());
    CHECK(json::parse(p.diagnostics_json)["verdict"] == "converged");
}

TEST_CASE("a converged run refuses --burn-in and --thin, which belong to fixed-length runs") {
    const auto& d = demo_fit();
    const auto dir = scratch_dir("cli-run-length");
    const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 --out " +
                                quoted(dir / "m.posterior") + " --burn-in 10");
    INFO(r.err);
    CHECK(r.exit_code == 2);
    CHECK(r.err.find("--burn-in applies to --run-length fixed") != std::string::npos);
    CHECK_FALSE(fs::exists(dir / "m.posterior"));
}

TEST_CASE("a fixed-length run refuses the converged run's budgets, and compare's folds refuse --holdout") {
    const auto& d = demo_fit();
    const auto dir = scratch_dir("cli-run-length-fixed");
    for (const std::string& flags : {std::string(" --max-sweeps 3"), std::string(" --time-limit 1s")}) {
        INFO(flags);
        const auto r = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 --run-length fixed --out " +
                                    quoted(dir / "m.posterior") + flags);
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("applies to --run-length converged") != std::string::npos);
        // compare's fits are fixed-length by default.
        const auto c = run_credence("compare --ratings " + quoted(d.ratings) + " --scale 1:5" + flags);
        CHECK(c.exit_code == 2);
        CHECK(c.err.find("applies to --run-length converged") != std::string::npos);
    }
    CHECK_FALSE(fs::exists(dir / "m.posterior"));
    // Options the sampler cannot run with stop the command before it reads the ratings.
    const auto budget = run_credence("fit --ratings " + quoted(d.ratings) + " --scale 1:5 --samples 50 --max-sweeps 60 "
                                     "--out " + quoted(dir / "m.posterior"));
    CHECK(budget.exit_code == 2);
    CHECK(budget.err.rfind("credence fit: --max-sweeps must be at least 2 x --samples", 0) == 0);
    const auto folds = run_credence("compare --ratings " + quoted(d.ratings) + " --scale 1:5 --folds 2 --holdout 0.5");
    CHECK(folds.exit_code == 2);
    CHECK(folds.err.find("each fold holds out 1/2") != std::string::npos);
}

TEST_CASE("report opens with provenance and a verdict and refuses a comparison made on other data") {
    const auto& d = demo_fit();
    REQUIRE(d.fit.exit_code == 0);
    const auto meta = json::parse(credence::read_posterior(d.model.string()).fit_metadata_json);
    const std::string fingerprint = meta.at("data_fingerprint").get<std::string>();

    credence::ComparisonResult c;
    c.folds = 1;
    c.holdout_fraction = 0.1;
    c.rule = "rule";
    c.configs.push_back(credence::ConfigScore{.rank = 4, .biases = true, .parameters = 1520});
    auto write = [&](const fs::path& path, const std::string& fp) {
        c.data_fingerprint = fp;
        std::ofstream(path) << credence::to_json(c).dump(2);
    };
    const fs::path other = d.dir / "other-data.comparison.json", same = d.dir / "same-data.comparison.json";
    write(other, "ffffffffffffffff");
    write(same, fingerprint);
    const fs::path html = d.dir / "provenance-report.html";

    const auto refused = run_credence("report " + quoted(d.model) + " --comparison " + quoted(other) +
                                      " --out " + quoted(html));
    CHECK(refused.exit_code == 1);
    CHECK(refused.err.find("other data") != std::string::npos);
    CHECK(refused.err.find(fingerprint) != std::string::npos);

    const auto ok = run_credence("report " + quoted(d.model) + " --comparison " + quoted(same) + " --out " +
                                 quoted(html));
    INFO(ok.err);
    INFO(ok.out);
    REQUIRE(ok.exit_code == 0);
    // The verdict follows the stored convergence verdict (this short fixed run
    // usually has not converged); once converged it judges by the held-out
    // ratings the fit stored (fit --holdout 0.1).
    const auto diag = json::parse(credence::read_posterior(d.model.string()).diagnostics_json);
    if (diag.at("verdict") == "converged")
        CHECK(ok.out.find("the ratings the fit held out") != std::string::npos);
    else
        CHECK(ok.out.find("Not fit for use: the chains") != std::string::npos);
    std::ifstream in(html);
    const std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    const auto provenance = text.find("id=\"provenance\"");
    REQUIRE(provenance != std::string::npos);
    CHECK(provenance < text.find("id=\"held-out\""));
    CHECK(text.find(fingerprint, provenance) != std::string::npos);
    CHECK(text.find(CREDENCE_PROJECT_VERSION, provenance) != std::string::npos);
    CHECK(text.find("<b>x86-64", provenance) != std::string::npos);  // the kernels' CPU level
    CHECK(text.find("<b>fixed</b>rank chosen", provenance) != std::string::npos);  // fit --rank 4
    CHECK(text.find("id=\"fitness\"") != std::string::npos);
}
