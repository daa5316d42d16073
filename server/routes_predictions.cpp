// POST /v1/predictions: predicted ratings with credible intervals for a batch
// of (user, item) pairs. Unknown ids fail per pair (a 404 error object in the
// answer); with "fallback": "population" an unknown customer gets the
// population answer instead, but an unknown product is always an error (a
// typo must not get a plausible rating).
#include <optional>

#include "model/predict/population.hpp"
#include "server/app.hpp"

namespace credence::server {

namespace {

nlohmann::json pair_error(const std::string& what, const std::string& id) {
    const std::string hint = what == "user" ? "; send \"fallback\": \"population\" for a population-level answer"
                                            : "; check the product id (the population fallback covers unknown "
                                              "customers only)";
    return {{"type", "urn:credence:problem:unknown-" + what},
            {"title", "Unknown " + what},
            {"status", 404},
            {"detail", "the model has no " + what + " '" + id + "'" + hint}};
}

void predict_handler(AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    check_query_names(req, {});  // everything is in the body
    const nlohmann::json body = parse_json_body(req);
    check_body_keys(body, {"pairs", "level", "fallback"}, "the body");
    const double level = json_level(body, 0.9);
    bool population = false;
    if (const auto it = body.find("fallback"); it != body.end()) {
        const std::string fallback = json_string(*it, "fallback");
        if (fallback == "population") population = true;
        else if (fallback != "none")
            throw bad_request("fallback must be \"none\" or \"population\", got '" + fallback + "'");
    }
    const auto pairs_it = body.find("pairs");
    if (pairs_it == body.end() || !pairs_it->is_array())
        throw bad_request("the body needs \"pairs\": an array of {\"user\": ..., \"item\": ...} objects");
    const auto& pairs = *pairs_it;
    if (pairs.size() > ctx.options.max_batch)
        throw bad_request("a batch may hold at most " + std::to_string(ctx.options.max_batch) + " pairs, got " +
                          std::to_string(pairs.size()) + "; split it into several requests");

    // Validate the whole batch before taking the model, so a bad request costs nothing.
    std::vector<std::pair<std::string, std::string>> ids;
    ids.reserve(pairs.size());
    for (size_t k = 0; k < pairs.size(); ++k) {
        const auto& pair = pairs[k];
        const std::string where = "pairs[" + std::to_string(k) + "]";
        if (!pair.is_object()) throw bad_request(where + " must be an object {\"user\": ..., \"item\": ...}");
        const auto u = pair.find("user"), i = pair.find("item");
        if (u == pair.end() || i == pair.end()) throw bad_request(where + " needs both \"user\" and \"item\"");
        check_body_keys(pair, {"user", "item"}, where);
        ids.emplace_back(json_string(*u, where + ".user"), json_string(*i, where + ".item"));
    }

    const auto model = ctx.model();
    nlohmann::json out = nlohmann::json::array();
    for (const auto& [user_id, item_id] : ids) {
        const std::optional<uint32_t> user = model->users.find(user_id);
        const std::optional<uint32_t> item = model->items.find(item_id);
        nlohmann::json answer = {{"user", user_id}, {"item", item_id}};
        if (user && item) {
            put_prediction(answer, model->engine.predict(*user, *item, level));
            answer["source"] = "model";
        } else if (population && item) {
            put_prediction(answer,
                           population_prediction(*model->posterior, model->statistics.covariances, user, item, level));
            answer["source"] = "population";
        } else {
            answer["error"] = !item ? pair_error("item", item_id) : pair_error("user", user_id);
        }
        out.push_back(std::move(answer));
    }
    write_json(res, {{"model", model->fingerprint}, {"level", level}, {"predictions", std::move(out)}},
               model.get());
}

}  // namespace

void install_prediction_routes(httplib::Server& server, AppContext& ctx) {
    server.Post("/v1/predictions", wrap_route(ctx, "/v1/predictions",
                                              [&ctx](const httplib::Request& req, httplib::Response& res) {
                                                  predict_handler(ctx, req, res);
                                              }));
}

}  // namespace credence::server
