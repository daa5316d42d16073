// Helpers for server tests: percent-encoding, JSON calls that record which
// (method, route pattern, status) the server answered (for the OpenAPI
// coverage check), and the synthetic shop model written to a file.
#pragma once
#include <cstdio>
#include <filesystem>
#include <set>
#include <string>
#include <tuple>

#include <httplib.h>
#include <nlohmann/json.hpp>

namespace credence::testing {

inline std::string url_encode(const std::string& s) {
    std::string out;
    for (unsigned char c : s) {
        if (std::isalnum(c) || c == '-' || c == '_' || c == '.' || c == '~') {
            out += static_cast<char>(c);
        } else {
            char buf[4];
            std::snprintf(buf, sizeof buf, "%%%02X", c);
            out += buf;
        }
    }
    return out;
}

struct Answer {
    int status = 0;
    std::string content_type;
    nlohmann::json body;
    std::string text;
    std::string model_header;
};

// Every (method, route pattern, status) seen, for the OpenAPI check.
inline std::set<std::tuple<std::string, std::string, int>>& answered_routes() {
    static std::set<std::tuple<std::string, std::string, int>> seen;
    return seen;
}

inline Answer to_answer(const httplib::Result& r, const std::string& method, const std::string& pattern) {
    Answer a;
    if (!r) return a;  // status 0: transport failure
    a.status = r->status;
    a.content_type = r->get_header_value("Content-Type");
    a.model_header = r->get_header_value("Credence-Model");
    a.text = r->body;
    a.body = nlohmann::json::parse(r->body, nullptr, false);
    answered_routes().insert({method, pattern, a.status});
    return a;
}

inline Answer get(httplib::Client& c, const std::string& pattern, const std::string& target) {
    return to_answer(c.Get(target.c_str()), "get", pattern);
}

inline Answer post(httplib::Client& c, const std::string& pattern, const std::string& target, const std::string& body,
                   const httplib::Headers& headers = {}) {
    return to_answer(c.Post(target.c_str(), headers, body, "application/json"), "post", pattern);
}

}  // namespace credence::testing
