// GET /v1/health (process alive), GET /v1/ready (a model is loaded),
// GET /v1/model (what is being served).
#include "server/app.hpp"

namespace credence::server {

namespace {

// The file's free-form JSON documents, passed through; a document that does
// not parse is shown as a string rather than failing the route.
nlohmann::json embedded_json(const std::string& text) {
    auto doc = nlohmann::json::parse(text, nullptr, false);
    return doc.is_discarded() ? nlohmann::json(text) : doc;
}

// The held-out check the fit stored (fit --holdout): its figures and the
// product-mean baseline's; null when the fit held nothing out.
nlohmann::json held_out_figures(const std::string& fit_metadata) {
    const auto meta = nlohmann::json::parse(fit_metadata, nullptr, false);
    if (meta.is_discarded() || !meta.is_object() || !meta.contains("validation") ||
        !meta["validation"].is_object() || !meta["validation"].contains("figures"))
        return nullptr;
    nlohmann::json out = meta["validation"]["figures"];
    out["kind"] = meta["validation"].value("kind", "");
    out["refit_on_all"] = meta.contains("refit_on_all");
    return out;
}

}  // namespace

void install_health_routes(httplib::Server& server, AppContext& ctx) {
    server.Get("/v1/health", wrap_route(ctx, "/v1/health", [](const httplib::Request&, httplib::Response& res) {
                   write_json(res, {{"status", "alive"}});
               }));

    server.Get("/v1/ready", wrap_route(ctx, "/v1/ready", [&ctx](const httplib::Request&, httplib::Response& res) {
                   const auto model = ctx.model();  // 503 problem when none
                   write_json(res, {{"status", "ready"}, {"model", model->fingerprint}}, model.get());
               }));

    server.Get("/v1/model", wrap_route(ctx, "/v1/model", [&ctx](const httplib::Request&, httplib::Response& res) {
                   const auto model = ctx.model();
                   const Posterior& p = *model->posterior;
                   nlohmann::json body = {
                       {"model", model->fingerprint},
                       {"source", model->source_path},
                       {"loaded_at_unix_s", model->loaded_at_unix_s},
                       {"load_ms", model->load_ms},
                       {"rank", p.rank},
                       {"samples", p.num_samples},
                       {"chains", p.num_chains},
                       {"users", p.num_users},
                       {"items", p.num_items},
                       {"has_biases", p.has_biases},
                       {"global_mean", p.global_mean},
                       {"scale", {{"min", p.scale.min}, {"max", p.scale.max}, {"declared", p.scale.declared}}},
                       {"held_out", held_out_figures(p.fit_metadata_json)},
                       {"fit", embedded_json(p.fit_metadata_json)},
                       {"diagnostics", embedded_json(p.diagnostics_json)},
                   };
                   write_json(res, body, model.get());
               }));
}

}  // namespace credence::server
