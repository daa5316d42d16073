// Tests server/routes_console.cpp through the real server: the console page
// and its two files come from the program byte for byte, with a
// Content-Security-Policy that allows only the server's own origin, and
// need no token even where the /v1 routes do. What the page does in a
// browser is tests/browser/test_console.py.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <regex>
#include <sstream>
#include <string>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;

namespace {

std::string source_text(const char* relative) {
    std::ifstream in(source_dir() / relative, std::ios::binary);
    std::ostringstream bytes;
    bytes << in.rdbuf();
    return bytes.str();
}

fs::path small_model(const fs::path& dir) {
    const fs::path model = dir / "shop.posterior";
    write_posterior(simulate_posterior({.users = 12, .items = 30, .rank = 2, .samples = 4, .chains = 2}), model.string());
    return model;
}

}  // namespace

TEST_CASE("the console page and its files are the ones in server/console, sent with a same-origin policy") {
    const fs::path dir = scratch_dir("routes_console");
    ServerProcess server(dir, small_model(dir));
    auto client = server.client();
    INFO(server.log());

    struct File {
        const char* path;
        const char* source;
        const char* content_type;
    };
    for (const File& file : {File{"/", "server/console/index.html", "text/html; charset=utf-8"},
                             File{"/console/console.css", "server/console/console.css", "text/css; charset=utf-8"},
                             File{"/console/console.js", "server/console/console.js", "text/javascript; charset=utf-8"},
                             File{"/console/icon.svg", "server/console/icon.svg", "image/svg+xml"}}) {
        INFO(file.path);
        const auto answer = client->Get(file.path);
        REQUIRE(answer);
        CHECK(answer->status == 200);
        CHECK(answer->get_header_value("Content-Type") == file.content_type);
        const std::string expected = source_text(file.source);
        REQUIRE(expected.size() > 200);
        CHECK(answer->body == expected);
        const std::string policy = answer->get_header_value("Content-Security-Policy");
        CHECK(policy.find("default-src 'none'") != std::string::npos);
        CHECK(policy.find("script-src 'self'") != std::string::npos);
        CHECK(policy.find("connect-src 'self'") != std::string::npos);
        // No other origin is named anywhere in the policy.
        CHECK(policy.find("http") == std::string::npos);
        CHECK(policy.find('*') == std::string::npos);
        CHECK(answer->get_header_value("X-Content-Type-Options") == "nosniff");
    }

    const auto missing = client->Get("/console/other.js");
    REQUIRE(missing);
    CHECK(missing->status == 404);
    CHECK(missing->get_header_value("Content-Type") == "application/problem+json");
    CHECK(missing->body.find("console.css, console.js and icon.svg") != std::string::npos);
}

TEST_CASE("the console's files name no other host to fetch from") {
    // Any http(s) URL in an attribute or a string would be a request off the
    // server; the SVG namespace name is an identifier, never fetched.
    const std::regex url(R"(https?://[^"'\s)]+)");
    for (const char* file : {"server/console/index.html", "server/console/console.css", "server/console/console.js",
                             "server/console/icon.svg"}) {
        INFO(file);
        const std::string text = source_text(file);
        REQUIRE_FALSE(text.empty());
        for (auto it = std::sregex_iterator(text.begin(), text.end(), url); it != std::sregex_iterator(); ++it) {
            INFO(it->str());
            CHECK(it->str() == "http://www.w3.org/2000/svg");
        }
    }
}

TEST_CASE("where tokens are required the page still loads and the API it calls asks for a token") {
    const fs::path dir = scratch_dir("routes_console_tokens");
    const std::string token = "console-route-test-token-0123456789abcdef";
    {
        std::ofstream tokens(dir / "api-tokens");
        tokens << "reader read " << token << "\n";
    }
    ServerProcess server(dir, small_model(dir),
                         "read_auth = \"required\"\napi_tokens_file = \"" + (dir / "api-tokens").string() + "\"");
    auto client = server.client();
    INFO(server.log());
    const auto page = client->Get("/");
    REQUIRE(page);
    CHECK(page->status == 200);
    const auto script = client->Get("/console/console.js");
    REQUIRE(script);
    CHECK(script->status == 200);
    const auto model = client->Get("/v1/model");
    REQUIRE(model);
    CHECK(model->status == 401);
    const auto with_token = client->Get("/v1/model", {{"Authorization", "Bearer " + token}});
    REQUIRE(with_token);
    CHECK(with_token->status == 200);
}
