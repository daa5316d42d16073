// GET /v1/health (process alive), GET /v1/ready (a model is loaded),
// GET /v1/model (a short summary of what is being served, naming no customer
// and no file path), GET /v1/model/trace (the fit's per-sweep traces) and
// GET /v1/model/diagnostics (every convergence quantity, probes numbered).
// The documents come from model/posterior/model_summary.hpp, so `credence
// inspect --json` prints the same summary.
#include <string>

#include "model/posterior/model_summary.hpp"
#include "server/app.hpp"

namespace credence::server {

void install_health_routes(httplib::Server& server, AppContext& ctx) {
    server.Get("/v1/health", wrap_route(ctx, "/v1/health", [](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   write_json(res, {{"status", "alive"}});
               }));

    server.Get("/v1/ready", wrap_route(ctx, "/v1/ready", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const auto model = ctx.model();  // 503 problem when none
                   write_json(res, {{"status", "ready"}, {"model", model->fingerprint}}, model.get());
               }));

    server.Get("/v1/model", wrap_route(ctx, "/v1/model", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const auto model = ctx.model();
                   nlohmann::json body = model_summary(*model->posterior);
                   body["model"] = model->fingerprint;
                   body["loaded_at_unix_s"] = model->loaded_at_unix_s;
                   body["load_ms"] = model->load_ms;
                   write_json(res, body, model.get());
               }));
    server.Get("/v1/model/trace",
               wrap_route(ctx, "/v1/model/trace", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const auto model = ctx.model();
                   write_json(res, {{"model", model->fingerprint}, {"trace", fit_trace(*model->posterior)}},
                              model.get());
               }));
    server.Get("/v1/model/diagnostics",
               wrap_route(ctx, "/v1/model/diagnostics", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const auto model = ctx.model();
                   write_json(res,
                              {{"model", model->fingerprint}, {"diagnostics", public_diagnostics(*model->posterior)}},
                              model.get());
               }));
}

}  // namespace credence::server
