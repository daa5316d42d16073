// Tests for the limits the server enforces in process (server/http_listener,
// server/request_gate): the real `credence serve` on a loopback port, fed
// raw bytes. Limits are set small so every case takes a second or two.
#include <catch2/catch.hpp>

#include <chrono>
#include <memory>
#include <thread>
#include <vector>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/raw_http.hpp"
#include "tests/support/run_command.hpp"
#include "tests/support/server_http.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;
using Clock = std::chrono::steady_clock;

namespace {

const std::string kToken = "limits-admin-token-0123456789";

struct Fixture {
    fs::path dir;
    std::unique_ptr<ServerProcess> server;
    Fixture() {
        dir = scratch_dir("server_limits");
        SimulatedPosteriorOptions spec{.users = 20, .items = 50, .rank = 3, .samples = 8, .chains = 2};
        spec.id_digits = 5;
        write_posterior(simulate_posterior(spec), (dir / "shop.posterior").string());
        std::ofstream(dir / "admin.token") << kToken << "\n";
        server = std::make_unique<ServerProcess>(
            dir, dir / "shop.posterior",
            "threads = 4\nconnection_limit = 6\nbody_limit_bytes = 65536\nheader_line_limit_bytes = 1024\n"
            "header_count_limit = 20\nrequest_deadline_ms = 1500\nread_timeout_ms = 1000\n"
            "keep_alive_timeout_ms = 2000\nkeep_alive_max_requests = 3\naccess_log = false\n"
            "admin_token_file = \"" + (dir / "admin.token").string() + "\"\n");
    }
};

Fixture& fixture() {
    static Fixture f;
    return f;
}

double seconds_since(Clock::time_point start) {
    return std::chrono::duration<double>(Clock::now() - start).count();
}

std::string body_of(const std::string& response) {
    const auto at = response.find("\r\n\r\n");
    return at == std::string::npos ? std::string() : response.substr(at + 4);
}

}  // namespace

TEST_CASE("a second server on a port in use refuses to start and names the port") {
    auto& f = fixture();
    const fs::path config = f.dir / "second.toml";
    std::ofstream(config) << "[serve]\nmodel = \"" << (f.dir / "shop.posterior").string()
                          << "\"\nhost = \"127.0.0.1\"\nport = " << f.server->port() << "\n";
    const auto start = Clock::now();
    const auto r = run_credence("serve --config " + quoted(config));
    CHECK(r.exit_code == 1);
    CHECK(r.err.find("port " + std::to_string(f.server->port())) != std::string::npos);
    CHECK(r.err.find("already in use") != std::string::npos);
    CHECK(seconds_since(start) < 10.0);
    // The first server still answers every request.
    auto c = f.server->client();
    for (int k = 0; k < 12; ++k) CHECK(c->Get("/v1/health")->status == 200);
}

TEST_CASE("a POST without a body or Content-Length is answered at once") {
    auto& f = fixture();
    SECTION("a route that needs no body: reload re-reads the file (the documented curl -X POST)") {
        RawConnection raw(f.server->port());
        const auto start = Clock::now();
        raw.send("POST /v1/admin/reload HTTP/1.1\r\nHost: x\r\nAuthorization: Bearer " + kToken + "\r\n\r\n");
        const std::string answer = raw.receive(5000, "}");
        CHECK(seconds_since(start) < 1.0);
        INFO(answer);
        CHECK(status_of(answer) == 200);
        CHECK(answer.find("\"model\"") != std::string::npos);
    }
    SECTION("a route that needs a body: a clear 400") {
        RawConnection raw(f.server->port());
        const auto start = Clock::now();
        raw.send("POST /v1/recommendations HTTP/1.1\r\nHost: x\r\n\r\n");
        const std::string answer = raw.receive(5000, "}");
        CHECK(seconds_since(start) < 1.0);
        CHECK(status_of(answer) == 400);
        CHECK(answer.find("needs a JSON object as the request body") != std::string::npos);
    }
}

TEST_CASE("a form-encoded body over 8 KB gets 413 naming the form limit") {
    auto& f = fixture();
    auto c = f.server->client();
    const std::string body = "{\"n\": 3}" + std::string(9000, ' ');
    auto r = c->Post("/v1/recommendations", body, "application/x-www-form-urlencoded");
    REQUIRE(r);
    CHECK(r->status == 413);
    CHECK(r->body.find("8192 bytes") != std::string::npos);
    CHECK(r->body.find("application/json") != std::string::npos);
    // The same bytes as JSON are fine.
    auto ok = c->Post("/v1/recommendations", body, "application/json");
    REQUIRE(ok);
    CHECK(ok->status == 200);
}

TEST_CASE("a Range header on a JSON route is ignored: the whole answer, never a part") {
    auto& f = fixture();
    auto c = f.server->client();
    auto whole = c->Get("/v1/model");
    auto ranged = c->Get("/v1/model", {{"Range", "bytes=0-10"}});
    REQUIRE(whole);
    REQUIRE(ranged);
    CHECK(ranged->status == 200);
    CHECK_FALSE(ranged->has_header("Content-Range"));
    CHECK(ranged->body == whole->body);
    CHECK(ranged->body.size() > 100);
}

TEST_CASE("two different Content-Length headers get 400") {
    auto& f = fixture();
    RawConnection raw(f.server->port());
    raw.send("POST /v1/recommendations HTTP/1.1\r\nHost: x\r\nContent-Length: 8\r\nContent-Length: 9\r\n\r\n{\"n\": 3}");
    const std::string answer = raw.receive(3000, "}");
    CHECK(status_of(answer) == 400);
    CHECK(answer.find("two different Content-Length") != std::string::npos);
}

TEST_CASE("a wrong method gets 405 with Allow") {
    auto& f = fixture();
    auto c = f.server->client();
    auto post_health = c->Post("/v1/health", "", "application/json");
    REQUIRE(post_health);
    CHECK(post_health->status == 405);
    CHECK(post_health->get_header_value("Allow") == "GET, HEAD");
    auto get_predictions = c->Get("/v1/predictions");
    REQUIRE(get_predictions);
    CHECK(get_predictions->status == 405);
    CHECK(get_predictions->get_header_value("Allow") == "POST");
    auto delete_user = c->Delete("/v1/users/cust-00001/recommendations");
    REQUIRE(delete_user);
    CHECK(delete_user->status == 405);
    CHECK(delete_user->get_header_value("Allow") == "GET, HEAD");
    // An unknown path stays 404, and so does a GET on a path the document's
    // pattern matches (/console/{asset}) but no route serves.
    CHECK(c->Post("/v1/nowhere", "", "application/json")->status == 404);
    auto nested = c->Get("/console/a/b");
    REQUIRE(nested);
    CHECK(nested->status == 404);
    CHECK(!nested->has_header("Allow"));
}

TEST_CASE("a chunked body over the body limit gets 413 and is not buffered") {
    auto& f = fixture();
    RawConnection raw(f.server->port());
    raw.send("POST /v1/predictions HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: chunked\r\n"
             "Content-Type: application/json\r\n\r\n");
    const std::string chunk = "4000\r\n" + std::string(0x4000, ' ') + "\r\n";  // 16 KiB each
    int sent = 0;
    for (; sent < 8 && raw.send(chunk); ++sent) {
    }
    const std::string answer = raw.receive(3000, "}");
    INFO(answer);
    CHECK(status_of(answer) == 413);
    CHECK(answer.find("65536 bytes") != std::string::npos);
    // A chunked body within the limit is decoded and answered.
    RawConnection ok(f.server->port());
    ok.send("POST /v1/recommendations HTTP/1.1\r\nHost: x\r\nTransfer-Encoding: chunked\r\n"
            "Content-Type: application/json\r\n\r\n4\r\n{\"n\"\r\n4\r\n: 2}\r\n0\r\n\r\n");
    const std::string good = ok.receive(3000, "]}");
    INFO(good);
    CHECK(status_of(good) == 200);
}

TEST_CASE("a header line without end is cut off at the line limit; too many headers too") {
    auto& f = fixture();
    RawConnection raw(f.server->port());
    raw.send("GET /v1/health HTTP/1.1\r\nX-Endless: ");
    bool cut = false;
    for (int k = 0; k < 64 && !cut; ++k) cut = !raw.send(std::string(1024, 'a'));
    const std::string answer = raw.receive(3000, "}");
    CHECK(status_of(answer) == 431);
    CHECK(answer.find("1024 bytes") != std::string::npos);

    RawConnection many(f.server->port());
    std::string head = "GET /v1/health HTTP/1.1\r\n";
    for (int k = 0; k < 25; ++k) head += "X-H" + std::to_string(k) + ": v\r\n";
    many.send(head + "\r\n");
    CHECK(status_of(many.receive(3000, "}")) == 431);
}

TEST_CASE("a request trickled a byte at a time is cut off at the request deadline") {
    auto& f = fixture();
    RawConnection raw(f.server->port());
    const std::string request = "GET /v1/health HTTP/1.1\r\nHost: x\r\nX-Slow: " + std::string(100, 's') + "\r\n\r\n";
    const auto start = Clock::now();
    bool cut = false;
    for (size_t k = 0; k < request.size() && !cut && seconds_since(start) < 6.0; ++k) {
        cut = !raw.send(request.substr(k, 1));
        // A byte every 100 ms: never a pause over read_timeout_ms (1000).
        std::this_thread::sleep_for(std::chrono::milliseconds(100));
        pollfd p{raw.fd(), POLLIN, 0};
        if (::poll(&p, 1, 0) > 0) break;
    }
    const std::string answer = raw.receive(3000, "}");
    const double elapsed = seconds_since(start);
    INFO(answer);
    CHECK(status_of(answer) == 408);
    // request_deadline_ms is 1500; the check runs at the next byte.
    CHECK(elapsed > 1.4);
    CHECK(elapsed < 3.0);
}

TEST_CASE("a pause between a request's bytes longer than read_timeout_ms gets 408") {
    auto& f = fixture();
    RawConnection raw(f.server->port());
    const auto start = Clock::now();
    raw.send("GET /v1/health HTTP/1.1\r\n");
    const std::string answer = raw.receive(4000, "}");
    CHECK(status_of(answer) == 408);
    CHECK(seconds_since(start) > 0.9);
    CHECK(seconds_since(start) < 2.5);
}

TEST_CASE("an idle connection is closed after keep_alive_timeout_ms, and after keep_alive_max_requests") {
    auto& f = fixture();
    {
        RawConnection idle(f.server->port());
        const auto start = Clock::now();
        CHECK(idle.wait_closed(6000));
        CHECK(seconds_since(start) > 1.8);
        CHECK(seconds_since(start) < 4.0);
        CHECK(idle.receive(10).empty());
    }
    // Three pipelined requests on one connection (the limit is 3): three
    // answers, the last says Connection: close, and the connection closes.
    RawConnection raw(f.server->port());
    const std::string one = "GET /v1/health HTTP/1.1\r\nHost: x\r\n\r\n";
    raw.send(one + one + one + one);
    const std::string answers = raw.receive(4000);
    size_t count = 0;
    for (size_t at = answers.find("HTTP/1.1 200"); at != std::string::npos; at = answers.find("HTTP/1.1 200", at + 1))
        ++count;
    CHECK(count == 3);
    CHECK(answers.find("Connection: close") != std::string::npos);
    CHECK(raw.closed_by_peer());
}

TEST_CASE("beyond the connection limit a new connection gets 503 at once, and service resumes") {
    auto& f = fixture();
    // Connections of earlier cases may still be closing (a lingering close
    // holds a worker), and so may this check's own scrape: a worker counts
    // its connection until just after closing it. So scrape over a
    // connection the server closes after answering, until the scrape's own
    // is the only one open, then give that one time to be gone; otherwise
    // one of the six below could be the one refused.
    const auto settle_start = Clock::now();
    for (;;) {
        RawConnection scrape(f.server->port());
        REQUIRE(scrape.send("GET /metrics HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n"));
        const std::string text = scrape.receive(3000);  // until the server closes it
        REQUIRE(scrape.closed_by_peer());
        if (text.find("\ncredence_http_connections_open 1\n") != std::string::npos) break;
        REQUIRE(seconds_since(settle_start) < 10.0);
        std::this_thread::sleep_for(std::chrono::milliseconds(50));
    }
    std::this_thread::sleep_for(std::chrono::milliseconds(200));
    std::vector<RawConnection> idle;
    for (int k = 0; k < 6; ++k) idle.emplace_back(f.server->port());
    std::this_thread::sleep_for(std::chrono::milliseconds(300));  // let the server accept them
    RawConnection extra(f.server->port());
    const auto start = Clock::now();
    extra.send("GET /v1/health HTTP/1.1\r\nHost: x\r\n\r\n");
    const std::string answer = extra.receive(3000, "}");
    INFO(answer);
    CHECK(status_of(answer) == 503);
    CHECK(seconds_since(start) < 0.5);
    CHECK(body_of(answer).find("6 connections") != std::string::npos);
    idle.clear();
    std::this_thread::sleep_for(std::chrono::milliseconds(300));
    auto c = f.server->client();
    auto health = c->Get("/v1/health");
    REQUIRE(health);
    CHECK(health->status == 200);
    auto metrics = c->Get("/metrics");
    REQUIRE(metrics);
    CHECK(metrics->body.find("credence_http_connections_refused_total 0") == std::string::npos);
}
