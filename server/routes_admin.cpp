// POST /v1/admin/reload: load a posterior file and swap it in atomically.
// Needs "Authorization: Bearer <token>" (401 without, 403 when wrong or when
// no token is configured). The body may name {"path": ...}, which must lie
// inside the configured model directory; without it the current file is
// re-read. The new model is loaded on this request's thread while other
// requests keep using the old one; on failure the old one stays (422).
// POST /v1/admin/forget {"customer": ...}: drops one customer's own factors
// from the served model at once (same token).
#include <filesystem>

#include "model/error.hpp"
#include "server/app.hpp"

namespace credence::server {

namespace {

// Compares without an early exit so response timing does not reveal how
// much of a guessed token was right.
bool same_token(const std::string& given, const std::string& expected) {
    if (given.size() != expected.size()) return false;
    unsigned char diff = 0;
    for (size_t k = 0; k < given.size(); ++k) diff |= static_cast<unsigned char>(given[k] ^ expected[k]);
    return diff == 0;
}

void check_token(const AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    if (ctx.admin_token.empty())
        throw HttpProblem(403, "admin-disabled", "Admin routes disabled",
                          "no admin token is configured; set admin_token_file or the " + ctx.options.admin_token_env +
                              " variable and restart");
    const std::string header = req.get_header_value("Authorization");
    if (header.rfind("Bearer ", 0) != 0) {
        res.set_header("WWW-Authenticate", "Bearer realm=\"credence-admin\"");
        throw HttpProblem(401, "unauthorized", "Unauthorized", "send the admin token as 'Authorization: Bearer <token>'");
    }
    if (!same_token(header.substr(7), ctx.admin_token))
        throw HttpProblem(403, "forbidden", "Forbidden", "the admin token is wrong");
}

// Resolves a requested path and checks it lies inside the model directory.
std::string allowed_path(const AppContext& ctx, const std::string& requested) {
    namespace fs = std::filesystem;
    if (ctx.options.model_dir.empty())
        throw HttpProblem(403, "path-not-allowed", "Path not allowed",
                          "reloading from another path is disabled; configure model_dir to allow files inside it");
    std::error_code ec;
    const fs::path dir = fs::weakly_canonical(ctx.options.model_dir, ec);
    fs::path file = fs::path(requested).is_absolute() ? fs::path(requested) : fs::path(ctx.options.model_dir) / requested;
    file = fs::weakly_canonical(file, ec);
    if (ec) throw bad_request("cannot resolve path '" + requested + "'");
    const auto rel = file.lexically_relative(dir);
    if (rel.empty() || *rel.begin() == ".." || rel.is_absolute())
        throw HttpProblem(403, "path-not-allowed", "Path not allowed",
                          "'" + requested + "' is outside the model directory " + dir.string());
    return file.string();
}

void reload_handler(AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    check_token(ctx, req, res);
    check_query_names(req, {});
    std::string path;
    if (!req.body.empty()) {
        const auto body = parse_json_body(req);
        check_body_keys(body, {"path"}, "the body");
        if (const auto it = body.find("path"); it != body.end()) path = allowed_path(ctx, json_string(*it, "path"));
    }
    const auto previous = ctx.slot.get();
    if (path.empty()) path = previous ? previous->source_path : ctx.options.model_path;
    std::shared_ptr<const LoadedModel> next;
    try {
        next = ctx.reload(path);
    } catch (const Error& e) {
        // The file path is the operator's, never a customer's: safe to log.
        server_log().error("reload of {} over HTTP failed, still serving the previous model: {}", path, e.what());
        throw HttpProblem(422, "reload-failed", "Reload failed",
                          std::string(e.what()) + "; still serving the previous model");
    }
    nlohmann::json body = {{"model", next->fingerprint}, {"source", next->source_path}, {"load_ms", next->load_ms}};
    body["previous"] = previous ? nlohmann::json(previous->fingerprint) : nlohmann::json(nullptr);
    write_json(res, body, next.get());
}

// Erasure on request: the customer's own factors leave the served model at
// once. The product factors still carry their influence until the next fit
// without their ratings (credence forget, then credence fit).
void forget_handler(AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    check_token(ctx, req, res);
    check_query_names(req, {});
    const auto body = parse_json_body(req);
    check_body_keys(body, {"customer"}, "the body");
    const auto it = body.find("customer");
    if (it == body.end()) throw bad_request("the body needs \"customer\": the id to remove from the served model");
    const std::string customer = json_string(*it, "customer");
    if (customer.empty()) throw bad_request("customer must not be empty");
    const AppContext::Forgotten outcome = ctx.forget(customer);
    write_json(res,
               {{"customer_found", outcome.found},
                {"rated_items_removed", outcome.rated_items},
                {"model", outcome.model->fingerprint},
                {"previous", outcome.previous->fingerprint},
                {"complete_after_refit", true},
                {"note", "the customer's own factors are gone from the served model and stay out of every model this "
                         "server loads until it restarts; product factors still carry their influence until the "
                         "next fit: remove their rows with credence forget, refit and reload"}},
               outcome.model.get());
}

}  // namespace

void install_admin_routes(httplib::Server& server, AppContext& ctx) {
    server.Post("/v1/admin/forget", wrap_route(ctx, "/v1/admin/forget",
                                               [&ctx](const httplib::Request& req, httplib::Response& res) {
                                                   forget_handler(ctx, req, res);
                                               }));
    server.Post("/v1/admin/reload", wrap_route(ctx, "/v1/admin/reload",
                                               [&ctx](const httplib::Request& req, httplib::Response& res) {
                                                   reload_handler(ctx, req, res);
                                               }));
}

}  // namespace credence::server
