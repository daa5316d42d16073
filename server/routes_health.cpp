// GET /v1/health (process alive), GET /v1/ready (a model is loaded),
// GET /v1/model (what is being served, naming no customer and no file path).
#include <string>
#include <utility>
#include <vector>

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

// What /v1/model may show of the fit metadata: everything but where the
// ratings came from (a path on the analyst's machine, a database URI) and the
// file a warm start began from (another path).
nlohmann::json public_fit_metadata(const std::string& text) {
    nlohmann::json doc = embedded_json(text);
    if (doc.is_object() && doc.contains("data") && doc["data"].is_object()) {
        doc["data"].erase("source");
        doc["data"].erase("query");  // may name tables, or a customer in a WHERE clause
    }
    if (doc.is_object() && doc.contains("start") && doc["start"].is_object()) doc["start"].erase("from");
    return doc.is_object() ? doc : nlohmann::json::object();
}

// The convergence figures with the probe pairs numbered instead of named:
// a probe is a (customer, product) pair the customer rated.
nlohmann::json public_diagnostics(const std::string& text) {
    nlohmann::json doc = embedded_json(text);
    if (!doc.is_object()) return nlohmann::json::object();
    std::vector<std::pair<std::string, std::string>> named;  // "prediction(u, i)" -> "prediction(probe k)"
    if (auto it = doc.find("quantities"); it != doc.end() && it->is_array()) {
        for (auto& q : *it) {
            if (!q.is_object() || (!q.contains("user_id") && !q.contains("item_id"))) continue;
            const auto id = [&](const char* key) {
                const auto found = q.find(key);
                return found != q.end() && found->is_string() ? found->get<std::string>() : std::string();
            };
            const std::string user = id("user_id"), item = id("item_id");
            q.erase("user_id");
            q.erase("item_id");
            q["probe"] = named.size() + 1;
            named.emplace_back("prediction(" + user + ", " + item + ")",
                               "prediction(probe " + std::to_string(named.size() + 1) + ")");
        }
    }
    // Warnings quote the worst quantity, which may be a probe pair.
    if (auto it = doc.find("warnings"); it != doc.end() && it->is_array()) {
        for (auto& w : *it) {
            if (!w.is_string()) continue;
            std::string text_of = w.get<std::string>();
            for (const auto& [from, to] : named)
                for (size_t at = text_of.find(from); at != std::string::npos; at = text_of.find(from, at + to.size()))
                    text_of.replace(at, from.size(), to);
            w = text_of;
        }
    }
    return doc;
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
                       {"fit", public_fit_metadata(p.fit_metadata_json)},
                       {"diagnostics", public_diagnostics(p.diagnostics_json)},
                   };
                   write_json(res, body, model.get());
               }));
}

}  // namespace credence::server
