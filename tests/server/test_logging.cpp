// Tests for server/logging: the JSON line formatter on its own (escaping,
// invalid UTF-8, the fields of an access line) and the logs of the real
// server with log_json = true: every line one JSON object, access lines with
// their fields, and ids only when log_ids is on.
#include <catch2/catch.hpp>

#include <regex>
#include <sstream>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>
#include <spdlog/details/log_msg.h>

#include "model/posterior/posterior_file.hpp"
#include "server/logging.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/raw_http.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;
using namespace credence::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

std::string format_line(bool payload_is_object, const std::string& logger, spdlog::level::level_enum level,
                        const std::string& payload) {
    const auto formatter = server::json_line_formatter(payload_is_object);
    const spdlog::details::log_msg msg(spdlog::string_view_t(logger.data(), logger.size()), level,
                                       spdlog::string_view_t(payload.data(), payload.size()));
    spdlog::memory_buf_t out;
    formatter->format(msg, out);
    return std::string(out.data(), out.size());
}

std::vector<json> json_lines(const std::string& log) {
    std::vector<json> lines;
    std::istringstream in(log);
    for (std::string line; std::getline(in, line);) {
        if (line.empty()) continue;
        INFO(line);
        auto parsed = json::parse(line, nullptr, false);
        CHECK(parsed.is_object());
        if (parsed.is_object()) lines.push_back(std::move(parsed));
    }
    return lines;
}

fs::path small_model(const fs::path& dir) {
    SimulatedPosteriorOptions spec{.users = 20, .items = 30, .rank = 3, .samples = 6, .chains = 2};
    spec.id_digits = 5;  // "cust-00003", "sku-00004"
    const auto path = dir / "shop.posterior";
    write_posterior(simulate_posterior(spec), path.string());
    return path;
}

}  // namespace

TEST_CASE("an event line is one JSON object with time, level, logger and the message escaped") {
    const std::string message = "cannot load \"model\\shop.posterior\"\nline two\ttab \xff end";
    const std::string line = format_line(false, "credence.serve", spdlog::level::warn, message);
    REQUIRE(line.back() == '\n');
    CHECK(line.find('\n') == line.size() - 1);  // one line, whatever the message holds
    const json j = json::parse(line);
    CHECK(std::regex_match(j.at("time").get<std::string>(),
                           std::regex(R"(\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z)")));
    CHECK(j.at("level") == "warning");
    CHECK(j.at("logger") == "credence.serve");
    // The invalid byte 0xff becomes U+FFFD; everything else is kept.
    CHECK(j.at("message") == "cannot load \"model\\shop.posterior\"\nline two\ttab \xef\xbf\xbd end");
    // The keys come in this order, so lines read alike.
    CHECK(line.rfind("{\"time\":", 0) == 0);
    CHECK(line.find("\"level\"") < line.find("\"logger\""));
}

TEST_CASE("an access line carries its fields after time, level and logger") {
    const std::string line = format_line(true, "credence.access", spdlog::level::info,
                                         R"({"method":"GET","route":"/v1/ready","status":200,"latency_ms":0.25})");
    const json j = json::parse(line);
    CHECK(j.at("logger") == "credence.access");
    CHECK(j.at("level") == "info");
    CHECK(j.at("method") == "GET");
    CHECK(j.at("route") == "/v1/ready");
    CHECK(j.at("status") == 200);
    CHECK(j.at("latency_ms") == 0.25);
    CHECK_FALSE(j.contains("message"));
}

TEST_CASE("with log_json the server writes only JSON lines, and ids only with log_ids") {
    const fs::path dir = scratch_dir("server_logging");
    const fs::path model = small_model(dir);
    for (const bool log_ids : {false, true}) {
        INFO("log_ids " << log_ids);
        const fs::path run_dir = dir / (log_ids ? "with-ids" : "without-ids");
        fs::create_directories(run_dir);
        ServerProcess server(run_dir, model,
                             std::string("log_json = true\naccess_log = true\nlog_ids = ") +
                                 (log_ids ? "true" : "false") + "\n");
        auto c = server.client();
        REQUIRE(c->Get("/v1/ready")->status == 200);
        REQUIRE(c->Get("/v1/users/cust-00003/recommendations?n=2")->status == 200);
        REQUIRE(c->Get("/v1/users/cust-99999/recommendations")->status == 404);
        // Requests no route saw are logged too: an unknown path, and one the
        // request gate refuses (two Content-Length values), whose problem
        // document still names its target.
        REQUIRE(c->Get("/v1/nowhere/cust-00007")->status == 404);
        std::string refused;
        {
            RawConnection raw(server.port());
            raw.send("POST /v1/recommendations?for=cust-00008 HTTP/1.1\r\nHost: x\r\nContent-Length: 8\r\n"
                     "Content-Length: 9\r\n\r\n{\"n\": 3}");
            refused = raw.receive(3000, "}");
        }
        CHECK(status_of(refused) == 400);
        CHECK(refused.find(R"("instance":"/v1/recommendations?for=cust-00008")") != std::string::npos);
        REQUIRE(server.stop() == 0);

        const auto lines = json_lines(server.log());
        size_t access = 0, events = 0;
        bool loaded = false, unmatched = false, gate = false;
        for (const auto& j : lines) {
            INFO(j.dump());
            CHECK(j.contains("time"));
            CHECK(j.contains("level"));
            const std::string logger = j.value("logger", "");
            if (logger == "credence.access") {
                ++access;
                CHECK(j.at("status").is_number_integer());
                CHECK(j.at("latency_ms").is_number());
                CHECK(j.contains("target") == log_ids);
                const std::string route = j.at("route");
                if (route == "unmatched") {
                    unmatched = true;
                    CHECK(j.at("method") == "GET");
                    CHECK(j.at("status") == 404);
                } else if (route == "gate") {
                    gate = true;
                    CHECK(j.at("method") == "POST");
                    CHECK(j.at("status") == 400);
                } else {
                    CHECK(j.at("method") == "GET");
                    CHECK(route.rfind("/v1/", 0) == 0);
                }
            } else {
                CHECK(logger == "credence.serve");
                ++events;
                if (j.at("message").get<std::string>().find("serving model") != std::string::npos) loaded = true;
            }
        }
        // The readiness polls of the harness, then the three requests above.
        CHECK(access >= 3);
        CHECK(events >= 2);
        CHECK(loaded);
        CHECK(unmatched);
        CHECK(gate);
        // Ratings are personal data: customer ids appear only with log_ids.
        for (const char* id : {"cust-00003", "cust-99999", "cust-00007", "cust-00008"}) {
            INFO(id);
            CHECK((server.log().find(id) != std::string::npos) == log_ids);
        }
    }
}
