// Tests for server/app: how wrap_route turns what escapes a handler into an
// RFC 9457 problem answer, following the taxonomy of model/error.hpp (client
// mistakes 400 with the message, server failures 500/503 without internals).
#include <catch2/catch.hpp>

#include <stdexcept>
#include <string>

#include <httplib.h>
#include <nlohmann/json.hpp>

#include "model/error.hpp"
#include "server/app.hpp"

using namespace credence;
using namespace credence::server;

namespace {

struct Answer {
    int status = 0;
    nlohmann::json body;
    std::string content_type;
};

// Runs `handler` behind wrap_route as if for GET /v1/probe?x=1.
Answer answer_of(const RouteHandler& handler) {
    AppContext ctx;
    ctx.options.access_log = false;
    const auto wrapped = wrap_route(ctx, "/v1/model", handler);
    httplib::Request req;
    req.method = "GET";
    req.path = "/v1/probe";
    req.target = "/v1/probe?x=1";
    httplib::Response res;
    wrapped(req, res);
    Answer a;
    a.status = res.status;
    a.content_type = res.get_header_value("Content-Type");
    a.body = nlohmann::json::parse(res.body, nullptr, false);
    return a;
}

template <typename E>
RouteHandler throwing(std::string message) {
    return [message](const httplib::Request&, httplib::Response&) { throw E(message); };
}

}  // namespace

TEST_CASE("an OptionError that escapes a handler is a 400 bad-parameter with the message as detail") {
    const auto a = answer_of(throwing<OptionError>("interval level must be strictly between 0 and 1, got 1.5"));
    CHECK(a.status == 400);
    CHECK(a.content_type == kProblemContentType);
    CHECK(a.body["type"] == "urn:credence:problem:bad-parameter");
    CHECK(a.body["status"] == 400);
    CHECK(a.body["detail"] == "interval level must be strictly between 0 and 1, got 1.5");
    CHECK(a.body["instance"] == "/v1/probe?x=1");
}

TEST_CASE("a DataError that escapes a handler is a 400 bad-data with the message as detail") {
    const auto a = answer_of(throwing<DataError>("rating 9 for item 'tea-0001' is outside the scale [1, 5]"));
    CHECK(a.status == 400);
    CHECK(a.body["type"] == "urn:credence:problem:bad-data");
    CHECK(a.body["detail"] == "rating 9 for item 'tea-0001' is outside the scale [1, 5]");
}

TEST_CASE("server-side credence errors answer 500 or 503 without their message") {
    SECTION("a file the server needs is unavailable: 503") {
        const auto a = answer_of(throwing<FileError>("/srv/models/secret-name.posterior: cannot open"));
        CHECK(a.status == 503);
        CHECK(a.body["type"] == "urn:credence:problem:file-unavailable");
        CHECK(a.body["detail"].get<std::string>().find("secret-name") == std::string::npos);
    }
    SECTION("a numeric failure: 500") {
        const auto a = answer_of(throwing<NumericError>("fold-in: precision under sample 3 is not positive definite"));
        CHECK(a.status == 500);
        CHECK(a.body["type"] == "urn:credence:problem:numeric-failure");
        CHECK(a.body["detail"].get<std::string>().find("sample 3") == std::string::npos);
    }
    SECTION("a corrupt file: 500") {
        const auto a = answer_of(throwing<FormatError>("/srv/models/secret-name.posterior: checksum mismatch"));
        CHECK(a.status == 500);
        CHECK(a.body["type"] == "urn:credence:problem:internal");
        CHECK(a.body["detail"].get<std::string>().find("secret-name") == std::string::npos);
    }
}

TEST_CASE("a bug (std::logic_error family) is a 500 internal problem without internals") {
    for (const auto& handler : {throwing<std::invalid_argument>("candidate item index 99 is beyond the model's 80 items"),
                                throwing<std::out_of_range>("recommend: user index 7 is beyond the model's 5 users"),
                                throwing<std::logic_error>("fit_bpmf built an inconsistent posterior")}) {
        const auto a = answer_of(handler);
        CHECK(a.status == 500);
        CHECK(a.body["type"] == "urn:credence:problem:internal");
        const auto detail = a.body["detail"].get<std::string>();
        CHECK(detail.find("index") == std::string::npos);
        CHECK(detail.find("posterior") == std::string::npos);
    }
}

TEST_CASE("an HttpProblem keeps its own status, type and detail") {
    const auto a = answer_of([](const httplib::Request&, httplib::Response&) {
        throw not_found("item", "the model has no item 'x'");
    });
    CHECK(a.status == 404);
    CHECK(a.body["type"] == "urn:credence:problem:unknown-item");
    CHECK(a.body["detail"] == "the model has no item 'x'");
}

TEST_CASE("a handler that answers is left alone") {
    const auto a = answer_of([](const httplib::Request&, httplib::Response& res) {
        res.status = 200;
        res.set_content("{\"ok\": true}", "application/json");
    });
    CHECK(a.status == 200);
    CHECK(a.body["ok"] == true);
}
