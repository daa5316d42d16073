// Tests for the HTML model report (report/html_report.cpp): a report of a
// small real fit, opened in headless Chromium (Debian's chromium package):
// the page loads without console messages, every plot has data marks, and
// a screenshot is kept in <build>/test-artifacts/report.png.
#include <catch2/catch.hpp>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <regex>
#include <sstream>
#include <string>

#include "model/assess/compare.hpp"
#include "model/assess/evaluate.hpp"
#include "model/fit/sampler.hpp"
#include "tests/support/simulate.hpp"
#include "report/html_report.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
namespace fs = std::filesystem;

namespace {

const char* kChromium = "/usr/bin/chromium";

std::string slurp(const fs::path& p) {
    std::ifstream in(p, std::ios::binary);
    std::stringstream ss;
    ss << in.rdbuf();
    return ss.str();
}

struct BrowserRun {
    int exit_code = -1;
    std::string dom;
    std::string log;
};

// Opens `page` in a fresh headless profile; `extra` adds flags (a screenshot).
BrowserRun open_in_chromium(const fs::path& page, const fs::path& work, const std::string& extra) {
    const fs::path profile = work / "profile";
    fs::remove_all(profile);
    fs::create_directories(profile);
    const fs::path dom = work / "dom.html", log = work / "chromium.log";
    const std::string cmd = std::string("timeout 120 ") + kChromium +
                            " --headless --no-sandbox --disable-gpu --disable-quic --no-first-run"
                            " --disable-background-networking --disable-component-update --disable-sync"
                            " --enable-logging=stderr --v=0 --user-data-dir=" + profile.string() + " " + extra +
                            " --dump-dom file://" + page.string() + " > " + dom.string() + " 2> " + log.string();
    BrowserRun r;
    r.exit_code = std::system(cmd.c_str());
    r.dom = slurp(dom);
    r.log = slurp(log);
    return r;
}

// Lines Chromium logs for page console messages (errors, CSP violations,
// failed loads) look like "...:INFO:CONSOLE(0)] "message", source: ...".
std::vector<std::string> console_lines(const std::string& log) {
    std::vector<std::string> out;
    std::istringstream in(log);
    for (std::string line; std::getline(in, line);)
        if (line.find("CONSOLE") != std::string::npos) out.push_back(line);
    return out;
}

// data-plot id -> number of data marks inside that <svg> in the live DOM.
std::map<std::string, int> marks_per_plot(const std::string& dom) {
    std::map<std::string, int> out;
    const std::regex open("<svg[^>]*data-plot=\"([a-z0-9-]+)\"");
    for (auto it = std::sregex_iterator(dom.begin(), dom.end(), open); it != std::sregex_iterator(); ++it) {
        const size_t start = static_cast<size_t>(it->position());
        const size_t end = dom.find("</svg>", start);
        const std::string body = dom.substr(start, end - start);
        int marks = 0;
        for (size_t at = body.find("class=\"data\""); at != std::string::npos; at = body.find("class=\"data\"", at + 1))
            ++marks;
        out[(*it)[1]] = marks;
    }
    return out;
}

}  // namespace

TEST_CASE("the report of a small fit renders in headless Chromium with content in every plot") {
    // A small model fitted for real: 2 chains so R-hat is defined.
    SimulationOptions sim;
    sim.users = 120;
    sim.items = 90;
    sim.rank = 3;
    sim.density = 0.25;
    sim.bias_sd = 0.3;
    sim.seed = 21;
    SimulatedData data = simulate_ratings(sim);
    data.ratings.scale = {1.0f, 5.0f, true};
    const HoldoutSplit split = split_holdout(data.ratings, 0.15, 5);
    FitOptions fo;
    fo.rank = 3;
    fo.run_length = RunLength::fixed;
    fo.burn_in = 40;
    fo.samples = 40;
    fo.thin = 1;
    fo.chains = 2;
    fo.seed = 8;
    auto posterior = std::make_shared<const Posterior>(fit_bpmf(split.train, fo).posterior);

    RatingSet validation;
    validation.users = split.train.users;
    validation.items = split.train.items;
    validation.scale = split.train.scale;
    validation.ratings = split.test;
    const EvaluationReport eval = evaluate(PredictionEngine(posterior), validation, {});

    CompareOptions co;
    co.ranks = {1, 3, 5};
    co.fit = fo;
    co.fit.chains = 1;
    co.fit.burn_in = 20;
    co.fit.samples = 15;
    const ComparisonResult comparison = compare_models(data.ratings, co);

    report::ReportInputs in;
    in.posterior = posterior.get();
    in.model_name = "shop-demo.post";
    in.validation = eval;
    in.validation_name = "shop-holdout.csv";
    in.comparison = comparison;
    const std::string html = report::render_html_report(in);

    // Self-contained: no scripts and nothing fetched from elsewhere.
    CHECK(html.find("<script") == std::string::npos);
    CHECK(html.find("http://") == html.find("http://www.w3.org/2000/svg"));
    CHECK(html.find("https://") == std::string::npos);
    CHECK(html.find("src=") == std::string::npos);

    const fs::path artifacts = credence::testing::artifacts_dir();
    const fs::path page = artifacts / "report.html";
    std::ofstream(page) << html;

    // The plots every section above must show.
    const std::vector<std::string> expected_plots{"trace-noise-precision", "trace-train-rmse", "trace-probe-1",
                                                  "coverage-curve", "pit-histogram", "sd-by-count", "rank-comparison"};
    // Without a browser, check the generated markup itself.
    const auto static_marks = marks_per_plot(html);
    for (const auto& id : expected_plots) {
        INFO("plot " << id);
        REQUIRE(static_marks.count(id) == 1);
        CHECK(static_marks.at(id) > 0);
    }
    // Exact counts where the data fix them: one line per chain in a trace,
    // one bar per PIT bin, one dot per product with training ratings.
    CHECK(static_marks.at("trace-noise-precision") == 2);
    CHECK(static_marks.at("pit-histogram") == 10);
    uint32_t rated_products = 0;
    {
        std::vector<bool> seen(posterior->num_items, false);
        for (uint32_t i : posterior->rated_items) seen[i] = true;
        for (bool b : seen) rated_products += b;
    }
    CHECK(static_marks.at("sd-by-count") == static_cast<int>(rated_products));

    if (!fs::exists(kChromium)) {
        std::cerr << "NOTICE: " << kChromium << " not found; skipping the browser check "
                  << "(scripts/setup.sh installs chromium)\n";
        return;
    }
    const fs::path work = credence::testing::scratch_dir("report-browser");
    const BrowserRun run = open_in_chromium(page, work,
                                            "--window-size=1280,4000 --screenshot=" + (artifacts / "report.png").string());
    INFO("chromium log:\n" << run.log);
    REQUIRE(run.exit_code == 0);
    CHECK(console_lines(run.log).empty());
    REQUIRE(run.dom.find("Credence model report") != std::string::npos);
    const auto live_marks = marks_per_plot(run.dom);
    for (const auto& id : expected_plots) {
        INFO("plot " << id);
        REQUIRE(live_marks.count(id) == 1);
        CHECK(live_marks.at(id) == static_marks.at(id));
    }
    CHECK(fs::exists(artifacts / "report.png"));
    CHECK(fs::file_size(artifacts / "report.png") > 20000);
    std::cerr << "report screenshot: " << (artifacts / "report.png") << "\n";

    // The console check has power: a page that tries to load an outside
    // image is blocked by the report's Content-Security-Policy, and Chromium
    // logs that on the console.
    std::string broken = html;
    broken.insert(broken.find("</main>"), "<img src=\"https://example.invalid/logo.png\" alt=\"\">");
    const fs::path broken_page = work / "broken.html";
    std::ofstream(broken_page) << broken;
    const BrowserRun bad = open_in_chromium(broken_page, work, "");
    CHECK_FALSE(console_lines(bad.log).empty());
}

TEST_CASE("the report names the least sure products by catalogue name and category beside their ids") {
    SimulatedPosteriorOptions spec{.users = 30, .items = 40, .rank = 3, .samples = 12, .chains = 2, .seed = 9};
    Posterior p = simulate_posterior(spec);
    for (uint32_t i = 0; i < p.num_items; ++i) {
        p.item_names.push_back("Thimbleford <mug> " + std::to_string(i));
        p.item_categories.push_back(i % 2 ? "kitchen" : "pantry");
    }
    report::ReportInputs in;
    in.posterior = &p;
    in.model_name = "shop.posterior";
    const std::string html = report::render_html_report(in);
    const size_t table = html.find("products the model is least sure about");
    REQUIRE(table != std::string::npos);
    const std::string rows = html.substr(table, html.find("</table>", table) - table);
    size_t named = 0;
    for (uint32_t i = 0; i < p.num_items; ++i) {
        const std::string row = "<td>" + p.item_ids[i] + "</td><td>Thimbleford &lt;mug&gt; " + std::to_string(i) +
                                "</td><td>" + p.item_categories[i] + "</td>";
        named += rows.find(row) != std::string::npos;
    }
    CHECK(named == 10);  // the table's 10 rows, each with id, escaped name and category
}
