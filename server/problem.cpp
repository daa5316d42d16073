#include "server/problem.hpp"

#include <httplib.h>

namespace credence::server {

HttpProblem bad_request(std::string detail) {
    return HttpProblem(400, "bad-parameter", "Bad parameter", std::move(detail));
}
HttpProblem bad_json(std::string detail) {
    return HttpProblem(400, "bad-json", "Malformed JSON body", std::move(detail));
}
HttpProblem not_found(std::string what, std::string detail) {
    return HttpProblem(404, "unknown-" + what, "Unknown " + what, std::move(detail));
}
HttpProblem no_model() {
    return HttpProblem(503, "no-model", "No model loaded",
                       "the server has not finished loading a model yet; retry after /v1/ready answers 200");
}

nlohmann::json problem_json(int status, const std::string& slug, const std::string& title,
                            const std::string& detail, const std::string& instance) {
    return nlohmann::json{{"type", "urn:credence:problem:" + slug},
                          {"title", title},
                          {"status", status},
                          {"detail", detail},
                          {"instance", instance}};
}

void write_problem(httplib::Response& res, int status, const std::string& slug, const std::string& title,
                   const std::string& detail, const std::string& instance) {
    res.status = status;
    // Invalid UTF-8 from a client's id must not make the error path throw.
    res.set_content(problem_json(status, slug, title, detail, instance)
                        .dump(-1, ' ', false, nlohmann::json::error_handler_t::replace),
                    kProblemContentType);
}

void write_problem(httplib::Response& res, const HttpProblem& problem, const std::string& instance) {
    write_problem(res, problem.status(), problem.slug(), problem.title(), problem.detail(), instance);
}

const char* status_title(int status) {
    switch (status) {
        case 400: return "Bad Request";
        case 401: return "Unauthorized";
        case 403: return "Forbidden";
        case 404: return "Not Found";
        case 405: return "Method Not Allowed";
        case 408: return "Request Timeout";
        case 409: return "Conflict";
        case 413: return "Content Too Large";
        case 414: return "URI Too Long";
        case 415: return "Unsupported Media Type";
        case 416: return "Range Not Satisfiable";
        case 417: return "Expectation Failed";
        case 422: return "Unprocessable Content";
        case 431: return "Request Header Fields Too Large";
        case 500: return "Internal Server Error";
        case 501: return "Not Implemented";
        case 503: return "Service Unavailable";
        case 505: return "HTTP Version Not Supported";
        default: return "Error";
    }
}

}  // namespace credence::server
