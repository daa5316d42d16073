// Tests for server/metrics: the exposition's own shape (every sample line
// belongs to a metric announced by # HELP and # TYPE), and that every metric
// the example Prometheus alert rules (config/prometheus/credence-alerts.yml)
// and README.md name is one the server really exports, so the examples
// cannot drift from the program.
#include <catch2/catch.hpp>

#include <fstream>
#include <memory>
#include <regex>
#include <set>
#include <sstream>
#include <string>

#include "model/posterior/posterior_file.hpp"
#include "server/metrics.hpp"
#include "server/model_slot.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;
namespace fs = std::filesystem;

namespace {

std::string read_text(const fs::path& path) {
    std::ifstream in(path);
    REQUIRE(in);
    std::ostringstream s;
    s << in.rdbuf();
    return s.str();
}

// The exposition of a Metrics that answered a few requests with a model
// loaded, refused one connection and watches a listener with 3 open.
std::string exposition() {
    const fs::path dir = testing::scratch_dir("server_metrics");
    const fs::path path = dir / "shop.posterior";
    write_posterior(simulate_posterior(SimulatedPosteriorOptions{.users = 10, .items = 12, .rank = 2, .samples = 4}),
                    path.string());
    const auto model = server::load_model_file(path.string());
    server::Metrics metrics;
    for (const int status : {200, 404, 500}) {
        metrics.request_started();
        metrics.request_finished("/v1/predictions", status, 0.003);
    }
    metrics.reload_finished(true);
    metrics.connection_refused();
    metrics.watch_open_connections([] { return 3u; });
    return metrics.render(model.get());
}

// Metric names announced with # TYPE, and the sample names a histogram adds.
std::set<std::string> exported_names(const std::string& text) {
    std::set<std::string> names;
    std::istringstream in(text);
    const std::regex type_line(R"(# TYPE (\w+) (counter|gauge|histogram))");
    for (std::string line; std::getline(in, line);) {
        std::smatch m;
        if (!std::regex_match(line, m, type_line)) continue;
        names.insert(m[1]);
        if (m[2] == "histogram")
            for (const char* suffix : {"_bucket", "_sum", "_count"}) names.insert(m[1].str() + suffix);
    }
    return names;
}

std::set<std::string> credence_metric_names_in(const std::string& text) {
    std::set<std::string> found;
    const std::regex name(R"(\bcredence_[a-z_]+\b)");
    for (auto it = std::sregex_iterator(text.begin(), text.end(), name); it != std::sregex_iterator(); ++it)
        found.insert(it->str());
    return found;
}

}  // namespace

TEST_CASE("every sample line belongs to a metric announced with HELP and TYPE") {
    const std::string text = exposition();
    const auto names = exported_names(text);
    CHECK(names.count("credence_http_requests_total") == 1);
    CHECK(names.count("credence_model_loaded") == 1);
    CHECK(text.find("\ncredence_http_connections_open 3\n") != std::string::npos);
    CHECK(text.find("\ncredence_http_connections_refused_total 1\n") != std::string::npos);
    std::istringstream in(text);
    size_t samples = 0;
    std::set<std::string> typed;
    for (std::string line; std::getline(in, line);) {
        if (line.rfind("# TYPE ", 0) == 0) {
            const std::string name = line.substr(7, line.find(' ', 7) - 7);
            typed.insert(name);
            INFO(line);
            CHECK(text.find("# HELP " + name + " ") != std::string::npos);
        }
        if (line.empty() || line[0] == '#') continue;
        ++samples;
        INFO(line);
        CHECK(names.count(line.substr(0, line.find_first_of("{ "))) == 1);
    }
    CHECK(typed.size() >= 7);
    CHECK(samples > 10);
}

TEST_CASE("the example alert rules and the README name only metrics the server exports") {
    const auto names = exported_names(exposition());
    const auto alerts = read_text(testing::source_dir() / "config" / "prometheus" / "credence-alerts.yml");
    const auto in_alerts = credence_metric_names_in(alerts);
    // The three documented alerts: not ready, error rate, p99 latency.
    for (const char* alert : {"alert: CredenceNotReady", "alert: CredenceErrorRate", "alert: CredenceLatencyP99"})
        CHECK(alerts.find(alert) != std::string::npos);
    CHECK(in_alerts.count("credence_model_loaded") == 1);
    CHECK(in_alerts.count("credence_http_requests_total") == 1);
    CHECK(in_alerts.count("credence_http_request_duration_seconds_bucket") == 1);
    for (const auto& name : in_alerts) {
        INFO("credence-alerts.yml names " << name);
        CHECK(names.count(name) == 1);
    }
    const auto in_readme = credence_metric_names_in(read_text(testing::source_dir() / "README.md"));
    CHECK(in_readme.size() >= 5);
    for (const auto& name : in_readme) {
        INFO("README.md names " << name);
        CHECK(names.count(name) == 1);
    }
}
