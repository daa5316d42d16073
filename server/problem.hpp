// RFC 9457 problem details: every error the service answers is an
// application/problem+json document {type, title, status, detail, instance}
// so a client developer sees what was wrong and what to send instead.
#pragma once
#include <stdexcept>
#include <string>

#include <nlohmann/json.hpp>

namespace httplib {
struct Request;
struct Response;
}  // namespace httplib

namespace credence::server {

inline constexpr const char* kProblemContentType = "application/problem+json";

// Thrown by route handlers; the request wrapper turns it into a problem
// response. `slug` names the problem type (becomes "urn:credence:problem:<slug>").
class HttpProblem : public std::runtime_error {
public:
    HttpProblem(int status, std::string slug, std::string title, std::string detail)
        : std::runtime_error(detail), status_(status), slug_(std::move(slug)), title_(std::move(title)) {}
    int status() const { return status_; }
    const std::string& slug() const { return slug_; }
    const std::string& title() const { return title_; }
    std::string detail() const { return what(); }

private:
    int status_;
    std::string slug_;
    std::string title_;
};

// Shorthands for the common cases.
HttpProblem bad_request(std::string detail);                         // 400 bad-parameter
HttpProblem bad_json(std::string detail);                            // 400 bad-json
HttpProblem not_found(std::string what, std::string detail);         // 404 unknown-<what>
HttpProblem no_model();                                              // 503 no-model

// The problem document for one error. `instance` is the request target.
nlohmann::json problem_json(int status, const std::string& slug, const std::string& title,
                            const std::string& detail, const std::string& instance);

// Writes a problem response (status, content type, body) into `res`.
void write_problem(httplib::Response& res, int status, const std::string& slug, const std::string& title,
                   const std::string& detail, const std::string& instance);
void write_problem(httplib::Response& res, const HttpProblem& problem, const std::string& instance);

// The standard reason phrase for a status (RFC 9110), used as a default title.
const char* status_title(int status);

}  // namespace credence::server
