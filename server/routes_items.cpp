// GET /v1/items/{item}: a product's rating count, its predictive mean and sd
// averaged over the customers, and its factor summary.
// GET /v1/items?order=uncertainty|popularity|mean&n=20&category=: ranked
// lists for analysts. GET /v1/items/{item}/similar?n=10: nearest products.
//
// The statistics and the similarity (per-sample cosine averaged over samples)
// come from model/predict/item_statistics.hpp; this file parses and serializes.
// "sd" means the predictive sd here as in every other answer.
#include <algorithm>

#include "model/predict/item_statistics.hpp"
#include "server/app.hpp"

namespace credence::server {

namespace {

nlohmann::json item_summary(const LoadedModel& m, uint32_t i) {
    const ItemStatistics& st = m.statistics;
    nlohmann::json out = item_json(m, i);
    out.update(nlohmann::json{{"rating_count", st.rating_count[i]},
                              {"mean", st.predictive_mean[i]},
                              {"sd", st.predictive_sd[i]}});
    return out;
}

void detail_handler(const LoadedModel& m, uint32_t i, httplib::Response& res) {
    const uint32_t K = m.rank();
    const ItemStatistics& st = m.statistics;
    nlohmann::json body = item_summary(m, i);
    body["model"] = m.fingerprint;
    body["factor_spread"] = st.factor_spread[i];
    body["factor_mean"] = std::vector<float>(st.factor_mean.begin() + static_cast<size_t>(i) * K,
                                             st.factor_mean.begin() + static_cast<size_t>(i + 1) * K);
    body["factor_sd"] = std::vector<float>(st.factor_sd.begin() + static_cast<size_t>(i) * K,
                                           st.factor_sd.begin() + static_cast<size_t>(i + 1) * K);
    write_json(res, body, &m);
}

void similar_handler(const AppContext& ctx, const httplib::Request& req, const LoadedModel& m, uint32_t target,
                     httplib::Response& res) {
    const uint32_t n = query_count(req, "n", 10, ctx.options.max_n);
    nlohmann::json items = nlohmann::json::array();
    for (const SimilarItem& similar : similar_items(*m.posterior, m.statistics, target, n)) {
        nlohmann::json entry = item_json(m, similar.item);
        entry["similarity"] = similar.similarity;
        items.push_back(std::move(entry));
    }
    write_json(res, {{"model", m.fingerprint}, {"item", m.items.name(target)}, {"items", std::move(items)}}, &m);
}

void list_handler(const AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    check_query_names(req, {"order", "n", "category"});
    const uint32_t n = query_count(req, "n", 20, ctx.options.max_n);
    const std::string order = req.has_param("order") ? req.get_param_value("order") : "uncertainty";
    const auto model = ctx.model();
    const std::vector<uint32_t>* ranking = nullptr;
    if (order == "uncertainty") ranking = &model->statistics.by_uncertainty;
    else if (order == "popularity") ranking = &model->statistics.by_popularity;
    else if (order == "mean") ranking = &model->statistics.by_mean;
    else throw bad_request("order must be one of uncertainty, popularity, mean; got '" + order + "'");
    std::vector<uint32_t> in_category;
    if (req.has_param("category")) in_category = category_items(*model, req.get_param_value("category"));
    nlohmann::json items = nlohmann::json::array();
    for (size_t k = 0; k < ranking->size() && items.size() < n; ++k) {
        const uint32_t i = (*ranking)[k];
        if (req.has_param("category") && !std::binary_search(in_category.begin(), in_category.end(), i)) continue;
        items.push_back(item_summary(*model, i));
    }
    nlohmann::json body = {{"model", model->fingerprint}, {"order", order}, {"items", std::move(items)}};
    if (req.has_param("category")) body["category"] = req.get_param_value("category");
    write_json(res, body, model.get());
}

void item_handler(const AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    const auto segments = decoded_path_segments(req);
    // ["", "v1", "items", <item>] or [..., <item>, "similar"]; ids may hold an encoded '/'.
    const bool similar = segments.size() == 5 && segments[4] == "similar";
    if (segments.size() != 4 && !similar)
        throw HttpProblem(404, "no-route", "Not Found",
                          "no route for " + req.path + "; use /v1/items/{item} or /v1/items/{item}/similar "
                          "(percent-encode '/' inside ids as %2F)");
    if (similar) check_query_names(req, {"n"});
    else check_query_names(req, {});
    if (similar) query_count(req, "n", 10, ctx.options.max_n);  // reject a bad n before anything else
    const auto model = ctx.model();
    const auto item = model->items.find(segments[3]);
    if (!item) throw not_found("item", "the model has no item '" + segments[3] + "'");
    if (similar) similar_handler(ctx, req, *model, *item, res);
    else detail_handler(*model, *item, res);
}

}  // namespace

void install_item_routes(httplib::Server& server, AppContext& ctx) {
    server.Get("/v1/items", wrap_route(ctx, "/v1/items", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   list_handler(ctx, req, res);
               }));
    // One pattern for both item routes; the handler splits the raw target so
    // an id containing "/similar" (encoded) is never mistaken for the route.
    auto detail = wrap_route(ctx, "/v1/items/{item}",
                             [&ctx](const httplib::Request& r, httplib::Response& s) { item_handler(ctx, r, s); });
    auto similar = wrap_route(ctx, "/v1/items/{item}/similar",
                              [&ctx](const httplib::Request& r, httplib::Response& s) { item_handler(ctx, r, s); });
    server.Get(R"(/v1/items/(.+))", [detail, similar](const httplib::Request& req, httplib::Response& res) {
        const std::string_view target = std::string_view(req.target).substr(0, req.target.find('?'));
        const bool is_similar = target.ends_with("/similar") && std::count(target.begin(), target.end(), '/') == 4;
        (is_similar ? similar : detail)(req, res);
    });
}

}  // namespace credence::server
