#include "server/app.hpp"

#include <algorithm>
#include <charconv>
#include <chrono>
#include <cmath>

#include "model/error.hpp"
#include "server/logging.hpp"

namespace credence::server {

namespace {

int hex_value(char c) {
    if (c >= '0' && c <= '9') return c - '0';
    if (c >= 'a' && c <= 'f') return c - 'a' + 10;
    if (c >= 'A' && c <= 'F') return c - 'A' + 10;
    return -1;
}

// `plus_is_space`: in a query string '+' stands for a space (as httplib
// decodes the other parameters); in a path it is itself.
std::string percent_decode(std::string_view s, bool plus_is_space = false) {
    std::string out;
    out.reserve(s.size());
    for (size_t i = 0; i < s.size(); ++i) {
        if (plus_is_space && s[i] == '+') {
            out += ' ';
        } else if (s[i] == '%') {
            const int hi = i + 2 < s.size() ? hex_value(s[i + 1]) : -1;
            const int lo = i + 2 < s.size() ? hex_value(s[i + 2]) : -1;
            if (hi < 0 || lo < 0)
                throw bad_request(std::string("malformed %-escape in the ") + (plus_is_space ? "query" : "path") +
                                  "; encode '%' as %25");
            out += static_cast<char>(hi * 16 + lo);
            i += 2;
        } else {
            out += s[i];
        }
    }
    return out;
}

}  // namespace

spdlog::logger& server_log() { return event_log(); }

std::shared_ptr<const LoadedModel> AppContext::model() const {
    auto m = slot.get();
    if (!m) throw no_model();
    return m;
}

namespace {

// `model` less every customer in `forgotten` (the same model when none is in it).
std::shared_ptr<const LoadedModel> less_forgotten(std::shared_ptr<const LoadedModel> model,
                                                  const std::set<std::string>& forgotten) {
    std::shared_ptr<const Posterior> posterior = model->posterior;
    bool changed = false;
    for (const auto& customer : forgotten) {
        const auto& ids = posterior->user_ids;
        const auto at = std::find(ids.begin(), ids.end(), customer);
        if (at == ids.end()) continue;
        posterior = std::make_shared<const Posterior>(
            without_user(*posterior, static_cast<uint32_t>(at - ids.begin())));
        changed = true;
    }
    if (!changed) return model;
    const double load_ms = model->load_ms;
    auto next = build_loaded_model(posterior, model->source_path);
    std::const_pointer_cast<LoadedModel>(next)->load_ms += load_ms;
    return next;
}

}  // namespace

AppContext::Forgotten AppContext::forget(const std::string& customer) {
    std::lock_guard lock(reload_mutex);
    Forgotten out;
    out.previous = model();
    forgotten.insert(customer);
    const auto user = out.previous->users.find(customer);
    if (!user) {
        out.model = out.previous;
        return out;
    }
    out.found = true;
    out.rated_items = out.previous->posterior->rated_by(*user).size();
    out.model = build_loaded_model(std::make_shared<const Posterior>(without_user(*out.previous->posterior, *user)),
                                   out.previous->source_path);
    slot.set(out.model);
    server_log().info("dropped a customer from the served model {} (now {}); {} forgotten since start",
                      out.previous->fingerprint, out.model->fingerprint, forgotten.size());
    return out;
}

std::shared_ptr<const LoadedModel> AppContext::reload(const std::string& path) {
    std::lock_guard lock(reload_mutex);
    try {
        auto next = less_forgotten(load_model_file(path), forgotten);
        slot.set(next);
        metrics.reload_finished(true);
        server_log().info("serving model {} from {} (loaded in {:.1f} ms)", next->fingerprint, path, next->load_ms);
        return next;
    } catch (...) {
        metrics.reload_finished(false);
        throw;
    }
}

uint64_t AppContext::next_seed() {
    const uint64_t t = static_cast<uint64_t>(std::chrono::steady_clock::now().time_since_epoch().count());
    return t ^ (seed_counter.fetch_add(1) * 0x9E3779B97F4A7C15ull);
}

namespace {

void write_internal_problem(httplib::Response& res, const httplib::Request& req) {
    write_problem(res, 500, "internal", "Internal Server Error",
                  "the server failed to answer this request; the log has the details", req.target);
}

// The taxonomy of model/error.hpp in HTTP terms. Request values and request
// data the handler did not catch itself are the client's to fix (400, the
// message as detail: it names the parameter or rating, never a file). The
// other credence::Errors are the server's: their messages may name files on
// the server, so only the log gets them.
void write_error_problem(httplib::Response& res, const httplib::Request& req, const std::string& route) {
    try {
        throw;
    } catch (const OptionError& e) {
        write_problem(res, 400, "bad-parameter", "Bad parameter", e.what(), req.target);
    } catch (const DataError& e) {
        write_problem(res, 400, "bad-data", "Unusable data", e.what(), req.target);
    } catch (const NumericError& e) {
        server_log().error("{} {}: numeric failure: {}", req.method, route, e.what());
        write_problem(res, 500, "numeric-failure", "Numeric failure",
                      "the model could not compute an answer for this request (a matrix that is not positive "
                      "definite); the log has the details",
                      req.target);
    } catch (const FileError& e) {
        server_log().error("{} {}: file error: {}", req.method, route, e.what());
        write_problem(res, 503, "file-unavailable", "Service Unavailable",
                      "the server could not read or write a file it needs; retry later, the log has the details",
                      req.target);
    } catch (const Error& e) {  // FormatError, or a plain Error
        server_log().error("{} {}: {}", req.method, route, e.what());
        write_internal_problem(res, req);
    } catch (const std::logic_error& e) {
        server_log().error("{} {}: internal error (a bug in credence; please report it): {}", req.method, route,
                           e.what());
        write_internal_problem(res, req);
    } catch (const std::exception& e) {
        server_log().error("{} {}: unexpected error: {}", req.method, route, e.what());
        write_internal_problem(res, req);
    } catch (...) {
        server_log().error("{} {}: unexpected error that is not a std::exception", req.method, route);
        write_internal_problem(res, req);
    }
}

}  // namespace

httplib::Server::Handler wrap_route(AppContext& ctx, std::string route, RouteHandler handler) {
    const uint8_t needed = route_permission(route);
    return [&ctx, needed, route = std::move(route), handler = std::move(handler)](const httplib::Request& req,
                                                                                  httplib::Response& res) {
        const auto start = std::chrono::steady_clock::now();
        ctx.metrics.request_started();
        try {
            ctx.access.check(req, res, needed);
            handler(req, res);
        } catch (const HttpProblem& p) {
            write_problem(res, p, req.target);
        } catch (...) {
            write_error_problem(res, req, route);
        }
        const double latency_s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        const int status = res.status == -1 ? 200 : res.status;
        ctx.metrics.request_finished(route, status, latency_s);
        if (ctx.options.access_log)
            log_access(req.method, route, status, latency_s * 1e3,
                       ctx.options.log_ids ? std::string_view(req.target) : std::string_view());
    };
}

std::vector<std::string> decoded_path_segments(const httplib::Request& req) {
    std::string_view target = req.target;
    target = target.substr(0, target.find('?'));
    std::vector<std::string> segments;
    size_t start = 0;
    while (start <= target.size()) {
        const size_t slash = target.find('/', start);
        const size_t end = slash == std::string_view::npos ? target.size() : slash;
        segments.push_back(percent_decode(target.substr(start, end - start)));
        if (slash == std::string_view::npos) break;
        start = slash + 1;
    }
    return segments;
}

namespace {

std::string known_list(std::initializer_list<std::string_view> known) {
    std::string out;
    for (std::string_view k : known) out += (out.empty() ? "" : ", ") + std::string(k);
    return out.empty() ? "none" : out;
}

bool is_known(std::initializer_list<std::string_view> known, std::string_view name) {
    return std::find(known.begin(), known.end(), name) != known.end();
}

}  // namespace

void check_query_names(const httplib::Request& req, std::initializer_list<std::string_view> known) {
    // The target's query string only: cpp-httplib also merges a form-encoded
    // body into req.params, and a JSON body sent without a Content-Type
    // (curl -d's default) would otherwise read as one unknown parameter.
    const size_t mark = req.target.find('?');
    httplib::Params query;
    if (mark != std::string::npos) httplib::detail::parse_query_text(req.target.substr(mark + 1), query);
    for (const auto& [name, value] : query) {
        if (is_known(known, name)) continue;
        if (name == "interval" && is_known(known, "level"))
            throw bad_request("the interval level is now the query parameter level (e.g. level=0.9), as in bodies "
                              "and answers; interval= is not accepted");
        throw bad_request("unknown query parameter '" + name + "'; this route accepts: " + known_list(known));
    }
}

void check_body_keys(const nlohmann::json& object, std::initializer_list<std::string_view> known,
                     const std::string& where) {
    if (!object.is_object()) return;
    for (const auto& [key, value] : object.items()) {
        if (is_known(known, key)) continue;
        if (key == "interval" && is_known(known, "level"))
            throw bad_request(where + ": the interval level is the key \"level\" (e.g. 0.9); \"interval\" is not "
                              "accepted");
        throw bad_request(where + " has an unknown key \"" + key + "\"; it accepts: " + known_list(known));
    }
}

std::vector<std::string> query_list(const httplib::Request& req, std::string_view name) {
    std::vector<std::string> out;
    const size_t q = req.target.find('?');
    if (q == std::string::npos) return out;
    std::string_view query = std::string_view(req.target).substr(q + 1);
    query = query.substr(0, query.find('#'));
    while (!query.empty()) {
        const size_t amp = query.find('&');
        const std::string_view pair = query.substr(0, amp);
        query = amp == std::string_view::npos ? std::string_view() : query.substr(amp + 1);
        const size_t eq = pair.find('=');
        if (percent_decode(pair.substr(0, eq), true) != name) continue;
        std::string_view value = eq == std::string_view::npos ? std::string_view() : pair.substr(eq + 1);
        while (true) {
            const size_t comma = value.find(',');
            const std::string id = percent_decode(value.substr(0, comma), true);
            if (id.empty())
                throw bad_request(std::string(name) + " has an empty id; list ids as " + std::string(name) + "=a," +
                                  "b or repeat " + std::string(name) + "=, and send a comma inside an id as %2C");
            out.push_back(id);
            if (comma == std::string_view::npos) break;
            value.remove_prefix(comma + 1);
        }
    }
    return out;
}

uint32_t query_count(const httplib::Request& req, const char* name, uint32_t fallback, uint32_t max_value) {
    if (!req.has_param(name)) return fallback;
    const std::string text = req.get_param_value(name);
    uint64_t value = 0;
    const auto [ptr, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
    if (ec != std::errc() || ptr != text.data() + text.size() || text.empty())
        throw bad_request(std::string(name) + " must be a whole number, got '" + text + "'");
    if (value < 1 || value > max_value)
        throw bad_request(std::string(name) + " must be between 1 and " + std::to_string(max_value) + ", got " +
                          text);
    return static_cast<uint32_t>(value);
}

namespace {
// The model's rule (check_interval_level), answered as a 400 naming the text sent.
double check_level(double level, const std::string& shown) {
    try {
        check_interval_level(level);
    } catch (const OptionError& e) {
        throw bad_request(std::string(e.what()) + " (sent as " + shown + ")");
    }
    return level;
}
}  // namespace

double query_level(const httplib::Request& req, const char* name, double fallback) {
    if (!req.has_param(name)) return fallback;
    const std::string text = req.get_param_value(name);
    double value = 0.0;
    const auto [ptr, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
    if (ec != std::errc() || ptr != text.data() + text.size() || text.empty())
        throw bad_request(std::string(name) + " must be a number strictly between 0 and 1, got '" + text + "'");
    return check_level(value, text);
}

bool query_bool(const httplib::Request& req, const char* name, bool fallback) {
    if (!req.has_param(name)) return fallback;
    const std::string text = req.get_param_value(name);
    if (text == "true") return true;
    if (text == "false") return false;
    throw bad_request(std::string(name) + " must be true or false, got '" + text + "'");
}

std::optional<uint64_t> query_seed(const httplib::Request& req, const char* name) {
    if (!req.has_param(name)) return std::nullopt;
    const std::string text = req.get_param_value(name);
    uint64_t value = 0;
    const auto [ptr, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
    if (ec != std::errc() || ptr != text.data() + text.size() || text.empty())
        throw bad_request(std::string(name) + " must be an unsigned 64-bit integer, got '" + text + "'");
    return value;
}

RankBy parse_rank_by(std::string_view text) {
    if (text == "mean") return RankBy::mean;
    if (text == "lower") return RankBy::lower;
    if (text == "upper") return RankBy::upper;
    if (text == "draw") return RankBy::draw;
    throw bad_request("rank_by must be one of mean, lower, upper, draw; got '" + std::string(text) + "'");
}

const char* rank_by_name(RankBy rank_by) {
    switch (rank_by) {
        case RankBy::mean: return "mean";
        case RankBy::lower: return "lower";
        case RankBy::upper: return "upper";
        case RankBy::draw: return "draw";
    }
    return "mean";
}

nlohmann::json parse_json_body(const httplib::Request& req) {
    if (req.body.empty())
        throw bad_json("this route needs a JSON object as the request body (Content-Type: application/json)");
    nlohmann::json body = nlohmann::json::parse(req.body, nullptr, /*allow_exceptions=*/false);
    if (body.is_discarded())
        throw bad_json("the request body is not valid JSON; send a JSON object with Content-Type: application/json");
    if (!body.is_object()) throw bad_json("the request body must be a JSON object");
    return body;
}

std::string json_string(const nlohmann::json& value, const std::string& where) {
    if (!value.is_string()) throw bad_request(where + " must be a string");
    return value.get<std::string>();
}

double json_level(const nlohmann::json& body, double fallback) {
    const auto it = body.find("level");
    if (it == body.end()) return fallback;
    if (!it->is_number()) throw bad_request("level must be a number strictly between 0 and 1");
    const double level = it->get<double>();
    return check_level(level, it->dump());
}

void write_json(httplib::Response& res, const nlohmann::json& body, const LoadedModel* model) {
    if (model) res.set_header("Credence-Model", model->fingerprint);
    res.status = 200;
    res.set_content(body.dump(-1, ' ', false, nlohmann::json::error_handler_t::replace), "application/json");
}

nlohmann::json item_json(const LoadedModel& model, uint32_t i) {
    nlohmann::json out = {{"item", model.items.name(i)}};
    const Posterior& p = *model.posterior;
    if (!p.item_name(i).empty()) out["name"] = p.item_name(i);
    if (!p.item_category(i).empty()) out["category"] = p.item_category(i);
    return out;
}

std::vector<uint32_t> category_items(const LoadedModel& model, const std::string& category) {
    const Posterior& p = *model.posterior;
    if (!p.has_catalogue())
        throw bad_request("category needs a model fitted with a catalogue (credence fit --catalogue FILE)");
    std::vector<uint32_t> out;
    for (uint32_t i = 0; i < p.num_items; ++i)
        if (p.item_category(i) == category) out.push_back(i);
    if (out.empty()) {
        std::set<std::string> known;
        for (uint32_t i = 0; i < p.num_items; ++i)
            if (!p.item_category(i).empty()) known.insert(p.item_category(i));
        std::string list;
        for (const auto& k : known) list += (list.empty() ? "" : ", ") + k;
        throw bad_request("no product has category '" + category + "'; the catalogue's categories are: " +
                          (list.empty() ? "(none)" : list));
    }
    return out;
}

void put_prediction(nlohmann::json& out, const Prediction& p) {
    out["mean"] = p.mean;
    out["sd"] = p.sd;
    out["lower"] = p.lower;
    out["upper"] = p.upper;
}

}  // namespace credence::server
