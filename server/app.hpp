// What every route group shares: the options, the model slot, metrics and
// helpers to parse requests strictly and answer JSON or problems.
#pragma once
#include <atomic>
#include <cstdint>
#include <functional>
#include <memory>
#include <mutex>
#include <optional>
#include <set>
#include <string>
#include <string_view>
#include <vector>

#include <httplib.h>
#include <nlohmann/json.hpp>
#include <spdlog/logger.h>

#include "model/predict/predict.hpp"
#include "server/access.hpp"
#include "server/metrics.hpp"
#include "server/model_slot.hpp"
#include "server/problem.hpp"
#include "server/server.hpp"

namespace credence::server {

struct AppContext {
    ServeOptions options;
    std::string admin_token;  // empty: admin routes are disabled (403)
    AccessPolicy access;      // API tokens and what each route needs (configured before serving)
    ModelSlot slot;
    Metrics metrics;
    std::mutex reload_mutex;  // one reload or forget at a time; guards forgotten
    std::set<std::string> forgotten;  // customers dropped by POST /v1/admin/forget since start
    std::atomic<uint64_t> seed_counter{0};

    // The current model, or throws the 503 problem.
    std::shared_ptr<const LoadedModel> model() const;
    // Loads `path` and swaps it in, less every forgotten customer; on failure
    // the old model stays and the error propagates. Returns the new model.
    std::shared_ptr<const LoadedModel> reload(const std::string& path);

    struct Forgotten {
        bool found = false;              // the model had this customer
        uint64_t rated_items = 0;        // how many products they had rated
        std::shared_ptr<const LoadedModel> model, previous;
    };
    // Drops `customer`'s own factors, bias, id and rated list from the model
    // being served (swapped in at once) and from every model loaded later by
    // this process. Throws the 503 problem when no model is loaded.
    Forgotten forget(const std::string& customer);
    // A fresh seed for requests that did not give one.
    uint64_t next_seed();
};

// The service log (stderr, so stdout carries only the "listening on" line).
spdlog::logger& server_log();

using RouteHandler = std::function<void(const httplib::Request&, httplib::Response&)>;

// Wraps a handler with the access check (route_permission(route) in
// server/access.hpp: 401/403 before the handler runs), metrics, the access
// log and error mapping (model/error.hpp's taxonomy in HTTP terms):
//   HttpProblem            its own problem response;
//   credence::OptionError  400 bad-parameter, the message as detail;
//   credence::DataError    400 bad-data, the message as detail;
//   credence::NumericError 500 numeric-failure;
//   credence::FileError    503 file-unavailable;
//   other credence::Error, std::logic_error (a bug) and anything else:
//                          500 internal.
// The 500 and 503 answers carry no internals (no message, no path); the
// service log gets the message. `route` is the pattern logged and counted;
// throws std::out_of_range (a bug) when it has no entry in the permission table.
httplib::Server::Handler wrap_route(AppContext& ctx, std::string route, RouteHandler handler);

// Route groups (one file each).
void install_health_routes(httplib::Server& server, AppContext& ctx);
void install_prediction_routes(httplib::Server& server, AppContext& ctx);
void install_recommendation_routes(httplib::Server& server, AppContext& ctx);
void install_item_routes(httplib::Server& server, AppContext& ctx);
void install_admin_routes(httplib::Server& server, AppContext& ctx);
// Everything above plus /metrics, /v1/openapi.json and the problem answers
// for unknown routes, oversized bodies and other transport errors.
void install_all_routes(httplib::Server& server, AppContext& ctx);

// ---- request helpers (all throw HttpProblem 400 on bad input)

// The raw path of the request target split on '/', each segment
// percent-decoded, so ids may contain any character including '/'.
std::vector<std::string> decoded_path_segments(const httplib::Request& req);

// Query parameters. Absent -> fallback; present but malformed -> 400.
uint32_t query_count(const httplib::Request& req, const char* name, uint32_t fallback, uint32_t max_value);
double query_level(const httplib::Request& req, const char* name, double fallback);
bool query_bool(const httplib::Request& req, const char* name, bool fallback);
std::optional<uint64_t> query_seed(const httplib::Request& req, const char* name);
RankBy parse_rank_by(std::string_view text);
const char* rank_by_name(RankBy rank_by);

// The request body as a JSON object (400 bad-json otherwise).
nlohmann::json parse_json_body(const httplib::Request& req);

// Strict field readers for JSON bodies (400 naming `where` otherwise).
std::string json_string(const nlohmann::json& value, const std::string& where);
double json_level(const nlohmann::json& body, double fallback);

// Sets a JSON body (invalid UTF-8 in echoed ids is replaced, never thrown)
// and the Credence-Model header naming the model that answered.
void write_json(httplib::Response& res, const nlohmann::json& body, const LoadedModel* model = nullptr);

// The JSON fields of one prediction: mean, sd, lower, upper.
void put_prediction(nlohmann::json& out, const Prediction& p);

}  // namespace credence::server
