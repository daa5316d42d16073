// Tests for server/access: the token file, constant-time matching, the route
// permission table against the OpenAPI document, and the access decisions
// for requests with and without tokens, direct and through a proxy.
#include <catch2/catch.hpp>

#include <fstream>
#include <set>
#include <string>

#include <httplib.h>
#include <nlohmann/json.hpp>

#include "model/error.hpp"
#include "server/access.hpp"
#include "server/problem.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
using namespace credence::server;

namespace {

const std::string kShop = "shopweb-0123456789abcdef0123456789abcdef";
const std::string kWidget = "widget-fedcba9876543210fedcba9876543210";
const std::string kOps = "ops-metrics-00000000000000000000000000000";

ApiTokens sample_tokens() {
    return ApiTokens::parse("# name  permissions  token\n"
                            "shop-web read,customers " + kShop + "\n"
                            "\n"
                            "widget read " + kWidget + "   # a partner's page widget\n"
                            "ops metrics " + kOps + "\n",
                            "tokens.txt");
}

httplib::Request request(const std::string& authorization = "", bool via_proxy = false) {
    httplib::Request req;
    req.method = "GET";
    if (!authorization.empty()) req.headers.emplace("Authorization", authorization);
    if (via_proxy) req.headers.emplace("X-Forwarded-For", "203.0.113.9");
    return req;
}

// The status check() answers with (200 when allowed).
int status_of(const AccessPolicy& policy, const httplib::Request& req, uint8_t needed) {
    httplib::Response res;
    try {
        policy.check(req, res, needed);
        return 200;
    } catch (const HttpProblem& p) {
        if (p.status() == 401) CHECK(res.get_header_value("WWW-Authenticate").rfind("Bearer", 0) == 0);
        return p.status();
    }
}

ServeOptions options(const std::string& read_auth, const std::string& host = "127.0.0.1") {
    ServeOptions o;
    o.read_auth = read_auth;
    o.host = host;
    return o;
}

}  // namespace

TEST_CASE("the token file names each token with its permissions") {
    const ApiTokens tokens = sample_tokens();
    REQUIRE(tokens.size() == 3);
    const ApiToken* shop = tokens.match(kShop);
    REQUIRE(shop);
    CHECK(shop->name == "shop-web");
    CHECK(shop->permissions == (kRead | kCustomers));
    CHECK(permission_names(shop->permissions) == "read,customers");
    REQUIRE(tokens.match(kWidget));
    CHECK(tokens.match(kWidget)->name == "widget");
    CHECK(tokens.match(kOps)->permissions == kMetrics);
}

TEST_CASE("a guess matches no token: wrong, a prefix, an extension, empty") {
    const ApiTokens tokens = sample_tokens();
    CHECK_FALSE(tokens.match(""));
    CHECK_FALSE(tokens.match(kShop.substr(0, kShop.size() - 1)));
    CHECK_FALSE(tokens.match(kShop + "0"));
    std::string flipped = kShop;
    flipped[10] ^= 1;
    CHECK_FALSE(tokens.match(flipped));
    CHECK_FALSE(tokens.match("shop-web"));
}

TEST_CASE("a token file with a mistake is refused naming the line") {
    auto refused = [](const std::string& text, const std::string& expected) {
        INFO(text);
        try {
            ApiTokens::parse(text, "tokens.txt");
            FAIL("accepted");
        } catch (const OptionError& e) {
            const std::string message = e.what();
            INFO(message);
            CHECK(message.find("tokens.txt line") != std::string::npos);
            CHECK(message.find(expected) != std::string::npos);
        }
    };
    refused("a read short-token\n", "at least 32");
    refused("a read,admin " + kShop + "\n", "unknown permission 'admin'");
    refused("a read\n", "three words");
    refused("a read " + kShop + " extra\n", "three words");
    refused("a read " + kShop + "\na read " + kWidget + "\n", "appears twice");
    refused("a read " + kShop + "\nb read " + kShop + "\n", "same secret");
    refused("bad/name read " + kShop + "\n", "token name");
    CHECK(ApiTokens::parse("# only comments\n\n", "tokens.txt").empty());
}

TEST_CASE("every route in the OpenAPI document has a permission, and every permission a documented route") {
    std::ifstream in(credence::testing::source_dir() / "server" / "openapi.json");
    const auto doc = nlohmann::json::parse(in);
    std::set<std::string> documented;
    for (const auto& [path, operations] : doc.at("paths").items()) {
        documented.insert(path);
        INFO(path);
        CHECK_NOTHROW(route_permission(path));
    }
    for (const auto& [route, needed] : route_permissions()) {
        INFO(route);
        CHECK(documented.count(std::string(route)) == 1);
    }
    // Routes keyed by a customer need the customers permission; health never a token.
    CHECK(route_permission("/v1/users/{user}/recommendations") == kCustomers);
    CHECK(route_permission("/v1/predictions") == kCustomers);
    CHECK(route_permission("/v1/recommendations") == kRead);
    CHECK(route_permission("/v1/health") == kOpen);
    CHECK(route_permission("/v1/ready") == kOpen);
    CHECK_THROWS_AS(route_permission("/v1/unknown"), std::out_of_range);
}

TEST_CASE("tokens are required off loopback and through a proxy unless switched off") {
    SECTION("required, or auto on a public address, cannot start without tokens") {
        AccessPolicy a, b;
        CHECK_THROWS_AS(a.configure(options("required"), ApiTokens{}), OptionError);
        CHECK_THROWS_AS(b.configure(options("auto", "0.0.0.0"), ApiTokens{}), OptionError);
    }
    SECTION("auto on loopback: a direct request without a token may do anything") {
        AccessPolicy policy;
        policy.configure(options("auto"), sample_tokens());
        CHECK(status_of(policy, request(), kCustomers) == 200);
        CHECK(status_of(policy, request(), kMetrics) == 200);
        // ... through a proxy it needs a token.
        CHECK(status_of(policy, request("", true), kRead) == 401);
        CHECK(status_of(policy, request("Bearer " + kWidget, true), kRead) == 200);
        // A token that is sent is checked even where none is required.
        CHECK(status_of(policy, request("Bearer not-a-token"), kRead) == 401);
        CHECK(status_of(policy, request("Bearer " + kWidget), kCustomers) == 403);
    }
    SECTION("auto on a public address with tokens") {
        AccessPolicy policy;
        policy.configure(options("auto", "0.0.0.0"), sample_tokens());
        CHECK(status_of(policy, request(), kRead) == 401);
        CHECK(status_of(policy, request(), kOpen) == 200);
        CHECK(status_of(policy, request("Bearer " + kWidget), kRead) == 200);
        CHECK(status_of(policy, request("Bearer " + kWidget), kCustomers) == 403);
        CHECK(status_of(policy, request("Bearer " + kShop), kCustomers) == 200);
        CHECK(status_of(policy, request("Bearer " + kShop), kMetrics) == 403);
        CHECK(status_of(policy, request("Bearer " + kOps), kMetrics) == 200);
        CHECK(status_of(policy, request("Basic " + kShop), kRead) == 401);
    }
    SECTION("metrics_access open lets anyone read /metrics") {
        AccessPolicy policy;
        ServeOptions o = options("required");
        o.metrics_access = "open";
        policy.configure(o, sample_tokens());
        CHECK(status_of(policy, request(), kMetrics) == 200);
        CHECK(status_of(policy, request(), kRead) == 401);
    }
    SECTION("off: no token needed anywhere") {
        AccessPolicy policy;
        policy.configure(options("off", "0.0.0.0"), ApiTokens{});
        CHECK(status_of(policy, request("", true), kCustomers) == 200);
    }
}

TEST_CASE("replacing the tokens rotates them at once") {
    AccessPolicy policy;
    policy.configure(options("required"), sample_tokens());
    CHECK(status_of(policy, request("Bearer " + kWidget), kRead) == 200);
    const std::string next = "widget2-aaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaaa";
    policy.replace_tokens(ApiTokens::parse("widget-2 read " + next + "\n", "tokens.txt"));
    CHECK(status_of(policy, request("Bearer " + kWidget), kRead) == 401);
    CHECK(status_of(policy, request("Bearer " + next), kRead) == 200);
}
