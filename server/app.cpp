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

std::string percent_decode(std::string_view s) {
    std::string out;
    out.reserve(s.size());
    for (size_t i = 0; i < s.size(); ++i) {
        if (s[i] == '%') {
            const int hi = i + 2 < s.size() ? hex_value(s[i + 1]) : -1;
            const int lo = i + 2 < s.size() ? hex_value(s[i + 2]) : -1;
            if (hi < 0 || lo < 0) throw bad_request("malformed %-escape in the path; encode '%' as %25");
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

void put_prediction(nlohmann::json& out, const Prediction& p) {
    out["mean"] = p.mean;
    out["sd"] = p.sd;
    out["lower"] = p.lower;
    out["upper"] = p.upper;
}

}  // namespace credence::server
