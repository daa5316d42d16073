// GET /v1/users/{user}/recommendations: top-N for a known user.
// POST /v1/recommendations: top-N for a visitor, by exact fold-in
// (model/predict/foldin.hpp): the visitor is integrated out, so the answer
// is deterministic. Both rank by mean, lower or upper interval bound, or one
// posterior draw, and give mean, sd and interval for every item. A draw
// ranking echoes its seed as a decimal string (a 64-bit integer does not
// survive a JavaScript number). Each entry also carries rank_value (the
// ranked number on the rating scale), rank_value_unclipped and why (rating
// count and the viewer's most similar rated products). Unknown query
// parameters and body keys are 400s. Known users' requests that arrive
// together share one pass over the item samples (server/topn_batcher.hpp).
#include <algorithm>
#include <charconv>
#include <optional>
#include <string>
#include <vector>

#include "model/error.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/item_statistics.hpp"
#include "server/app.hpp"
#include "server/topn_batcher.hpp"

namespace credence::server {

namespace {

// One for the process, sized by the first server's options (a process runs
// one server): requests share passes only when they are for the same
// engine, so models never mix.
TopNBatcher& known_user_batcher(const ServeOptions& options) {
    static TopNBatcher batcher(options.topn_lanes, options.topn_batch_max, options.topn_window_us);
    return batcher;
}

uint32_t item_index(const LoadedModel& model, const std::string& id) {
    const auto index = model.items.find(id);
    if (!index)
        throw not_found("item", "the model has no item '" + id + "'" +
                                    (id.find(',') != std::string::npos
                                         ? "; an encoded comma (%2C) is part of an id: to list several ids, send "
                                           "literal commas (items=a,b) or repeat items= for each id"
                                         : ""));
    return *index;
}

// Narrows the request's candidates (or every product) to one catalogue
// category. Throws the 400 problems of category_items().
std::vector<uint32_t> category_candidates(const LoadedModel& model, const std::string& category,
                                          const std::optional<std::vector<uint32_t>>& candidates) {
    std::vector<uint32_t> in_category = category_items(model, category);  // ascending
    if (!candidates) return in_category;
    std::vector<uint32_t> out;
    for (uint32_t i : *candidates)
        if (std::binary_search(in_category.begin(), in_category.end(), i)) out.push_back(i);
    return out;
}

// What the customer rated, for the "why" of each entry: their items and,
// for a visitor, the ratings they gave (a known customer's ratings are not
// in the posterior file, only which products they rated).
struct RatedByViewer {
    std::vector<uint32_t> items;
    std::vector<double> ratings;  // empty, or one per item
};

// "why": the product's training rating count and up to 3 of the viewer's
// rated products most similar to it (averaged factor cosine,
// model/predict/item_statistics.hpp), only those with a positive
// similarity. `similar` is most_similar_among() of the item.
nlohmann::json why_json(const LoadedModel& model, uint32_t item, const RatedByViewer& rated,
                        const std::vector<SimilarItem>& most_similar) {
    nlohmann::json similar = nlohmann::json::array();
    for (const SimilarItem& s : most_similar) {
        if (!(s.similarity > 0.0)) break;  // an opposite direction explains nothing; the list is best first
        nlohmann::json entry = item_json(model, s.item);
        entry["similarity"] = s.similarity;
        if (!rated.ratings.empty()) {
            const size_t at = static_cast<size_t>(std::find(rated.items.begin(), rated.items.end(), s.item) -
                                                  rated.items.begin());
            entry["rating"] = rated.ratings.at(at);
        }
        similar.push_back(std::move(entry));
    }
    return {{"rating_count", model.statistics.rating_count[item]}, {"similar_rated", std::move(similar)}};
}

// One entry per recommendation: the product, its prediction, the number it
// was ranked by on the rating scale (rank_value) and unclipped
// (rank_value_unclipped, which orders entries tied at a scale end), and why.
nlohmann::json recommendation_list(const LoadedModel& model, const std::vector<Recommendation>& recs,
                                   const RatedByViewer& rated) {
    constexpr uint32_t kSimilarShown = 3;
    std::vector<uint32_t> targets;
    targets.reserve(recs.size());
    for (const auto& r : recs) targets.push_back(r.item);
    // One pass over the samples explains every entry (the rated products'
    // factors are read once, not once per entry).
    const auto similar = most_similar_among_each(*model.posterior, model.statistics, targets, rated.items, kSimilarShown);
    nlohmann::json items = nlohmann::json::array();
    for (size_t k = 0; k < recs.size(); ++k) {
        const auto& r = recs[k];
        nlohmann::json entry = item_json(model, r.item);
        put_prediction(entry, r.prediction);
        entry["rank_value"] = r.rank_value;
        entry["rank_value_unclipped"] = r.score;
        entry["why"] = why_json(model, r.item, rated, similar[k]);
        items.push_back(std::move(entry));
    }
    return items;
}

void user_handler(AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    TopNBatcher& batcher = known_user_batcher(ctx.options);
    const TopNBatcher::Visit visit(batcher);  // until the answer is built: the collection window counts it
    const auto segments = decoded_path_segments(req);
    // ["", "v1", "users", <user>, "recommendations"]; ids may contain '/' when encoded.
    if (segments.size() != 5 || segments[4] != "recommendations")
        throw HttpProblem(404, "no-route", "Not Found",
                          "no route for " + req.path + "; did you mean /v1/users/{user}/recommendations?");
    const std::string& user_id = segments[3];
    check_query_names(req, {"n", "rank_by", "level", "exclude_rated", "seed", "items", "category"});

    RecommendOptions options;
    options.n = query_count(req, "n", 10, ctx.options.max_n);
    options.rank_by = req.has_param("rank_by") ? parse_rank_by(req.get_param_value("rank_by")) : RankBy::mean;
    options.level = query_level(req, "level", 0.9);
    options.exclude_rated = query_bool(req, "exclude_rated", true);
    const auto seed = query_seed(req, "seed");
    options.draw_seed = seed ? *seed : ctx.next_seed();
    const std::vector<std::string> candidate_ids = query_list(req, "items");
    if (candidate_ids.size() > ctx.options.max_batch)
        throw bad_request("items may list at most " + std::to_string(ctx.options.max_batch) + " candidates");

    const auto model = ctx.model();
    const auto user = model->users.find(user_id);
    if (!user)
        throw not_found("user", "the model has no user '" + user_id +
                                    "'; use POST /v1/recommendations with the visitor's ratings instead");
    if (!candidate_ids.empty()) {
        std::vector<uint32_t> candidates;
        for (const auto& id : candidate_ids) candidates.push_back(item_index(*model, id));
        options.candidates = std::move(candidates);
    }
    if (req.has_param("category"))
        options.candidates = category_candidates(*model, req.get_param_value("category"), options.candidates);
    const auto recs = batcher.recommend(model->engine, *user, options);
    const auto rated_span = model->posterior->rated_by(*user);
    const RatedByViewer rated{{rated_span.begin(), rated_span.end()}, {}};
    nlohmann::json body = {{"model", model->fingerprint},
                           {"user", user_id},
                           {"rank_by", rank_by_name(options.rank_by)},
                           {"level", options.level},
                           {"items", recommendation_list(*model, recs, rated)}};
    if (options.rank_by == RankBy::draw) body["seed"] = std::to_string(options.draw_seed);
    write_json(res, body, model.get());
}

uint32_t json_count(const nlohmann::json& body, const char* name, uint32_t fallback, uint32_t max_value) {
    const auto it = body.find(name);
    if (it == body.end()) return fallback;
    if (!it->is_number_integer()) throw bad_request(std::string(name) + " must be a whole number");
    const auto value = it->get<int64_t>();
    if (value < 1 || static_cast<uint64_t>(value) > max_value)
        throw bad_request(std::string(name) + " must be between 1 and " + std::to_string(max_value) + ", got " +
                          std::to_string(value));
    return static_cast<uint32_t>(value);
}

// A seed in a JSON body: a string of decimal digits (what answers return)
// or a non-negative integer. Throws a 400 problem otherwise.
uint64_t json_seed(const nlohmann::json& value) {
    const char* const expected = "seed must be an unsigned 64-bit integer, preferably as a string of digits (\"42\")";
    if (value.is_number_unsigned()) return value.get<uint64_t>();
    if (!value.is_string()) throw bad_request(expected);
    const std::string& text = value.get_ref<const std::string&>();
    uint64_t seed = 0;
    const auto [ptr, ec] = std::from_chars(text.data(), text.data() + text.size(), seed);
    if (text.empty() || ec != std::errc() || ptr != text.data() + text.size()) throw bad_request(expected);
    return seed;
}

void visitor_handler(AppContext& ctx, const httplib::Request& req, httplib::Response& res) {
    check_query_names(req, {});  // everything is in the body
    const nlohmann::json body = parse_json_body(req);
    check_body_keys(body, {"ratings", "n", "rank_by", "level", "exclude_rated", "seed", "items", "category"},
                    "the body");
    RecommendOptions options;
    options.n = json_count(body, "n", 10, ctx.options.max_n);
    options.level = json_level(body, 0.9);
    if (const auto it = body.find("rank_by"); it != body.end()) options.rank_by = parse_rank_by(json_string(*it, "rank_by"));
    if (const auto it = body.find("exclude_rated"); it != body.end()) {
        if (!it->is_boolean()) throw bad_request("exclude_rated must be true or false");
        options.exclude_rated = it->get<bool>();
    }
    // Only a draw ranking uses a seed; without one it gets a fresh one.
    if (options.rank_by == RankBy::draw) {
        const auto it = body.find("seed");
        options.draw_seed = it != body.end() ? json_seed(*it) : ctx.next_seed();
    } else if (body.contains("seed")) {
        json_seed(body["seed"]);  // still checked, so a malformed seed is never silently ignored
    }

    std::vector<std::pair<std::string, double>> rated;
    if (const auto it = body.find("ratings"); it != body.end()) {
        if (!it->is_array()) throw bad_request("ratings must be an array of {\"item\": ..., \"rating\": ...}");
        if (it->size() > ctx.options.max_batch)
            throw bad_request("ratings may hold at most " + std::to_string(ctx.options.max_batch) + " entries");
        for (size_t k = 0; k < it->size(); ++k) {
            const auto& r = (*it)[k];
            const std::string where = "ratings[" + std::to_string(k) + "]";
            if (!r.is_object() || !r.contains("item") || !r.contains("rating"))
                throw bad_request(where + " must be an object {\"item\": ..., \"rating\": ...}");
            check_body_keys(r, {"item", "rating"}, where);
            if (!r["rating"].is_number()) throw bad_request(where + ".rating must be a number");
            rated.emplace_back(json_string(r["item"], where + ".item"), r["rating"].get<double>());
        }
    }
    std::vector<std::string> candidate_ids;
    if (const auto it = body.find("items"); it != body.end()) {
        if (!it->is_array()) throw bad_request("items must be an array of item ids");
        if (it->size() > ctx.options.max_batch)
            throw bad_request("items may list at most " + std::to_string(ctx.options.max_batch) + " candidates");
        for (size_t k = 0; k < it->size(); ++k)
            candidate_ids.push_back(json_string((*it)[k], "items[" + std::to_string(k) + "]"));
    }

    const auto model = ctx.model();
    std::vector<VisitorRating> ratings;
    ratings.reserve(rated.size());
    for (const auto& [id, value] : rated) ratings.push_back({item_index(*model, id), value});
    try {
        check_visitor_ratings(*model->posterior, ratings);
    } catch (const DataError& e) {
        throw bad_request(e.what());  // an item rated twice, a rating outside the scale
    }
    if (!candidate_ids.empty()) {
        std::vector<uint32_t> candidates;
        for (const auto& id : candidate_ids) candidates.push_back(item_index(*model, id));
        options.candidates = std::move(candidates);
    }
    if (const auto it = body.find("category"); it != body.end())
        options.candidates = category_candidates(*model, json_string(*it, "category"), options.candidates);
    const auto recs = recommend_for_visitor(model->engine, ratings, options);
    RatedByViewer rated_by_visitor;
    for (const VisitorRating& r : ratings) {
        rated_by_visitor.items.push_back(r.item);
        rated_by_visitor.ratings.push_back(r.rating);
    }
    nlohmann::json answer = {{"model", model->fingerprint},
                             {"rank_by", rank_by_name(options.rank_by)},
                             {"level", options.level},
                             {"items", recommendation_list(*model, recs, rated_by_visitor)}};
    if (options.rank_by == RankBy::draw) answer["seed"] = std::to_string(options.draw_seed);
    write_json(res, answer, model.get());
}

}  // namespace

void install_recommendation_routes(httplib::Server& server, AppContext& ctx) {
    server.Get(R"(/v1/users/(.+))", wrap_route(ctx, "/v1/users/{user}/recommendations",
                                               [&ctx](const httplib::Request& req, httplib::Response& res) {
                                                   user_handler(ctx, req, res);
                                               }));
    server.Post("/v1/recommendations", wrap_route(ctx, "/v1/recommendations",
                                                  [&ctx](const httplib::Request& req, httplib::Response& res) {
                                                      visitor_handler(ctx, req, res);
                                                  }));
}

}  // namespace credence::server
