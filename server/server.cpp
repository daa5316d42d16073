// run_server: binds, loads the model off the request path, serves until
// SIGINT/SIGTERM, reloads on SIGHUP. Also installs the routes that belong to
// no group (/metrics, /v1/openapi.json) and the problem answers for requests
// that reach no handler (unknown route, body too large, malformed request).
#include "server/server.hpp"

#include <chrono>
#include <cctype>
#include <csignal>
#include <cstdio>
#include <regex>
#include <iostream>
#include <string_view>
#include <thread>

#include <pthread.h>
#include <spdlog/spdlog.h>

#include "generated/credence_version.hpp"
#include "generated/openapi_json.hpp"
#include "model/error.hpp"
#include "model/math/cpu_level.hpp"
#include "server/app.hpp"
#include "server/logging.hpp"
#include "server/http_listener.hpp"

namespace credence::server {

namespace {

// The methods the OpenAPI document (compiled in: the one list of routes)
// gives for `path`, as an Allow value ("GET, HEAD"); empty for no such path.
std::string allowed_methods(const std::string& path) {
    static const std::vector<std::pair<std::regex, std::string>> table = [] {
        std::vector<std::pair<std::regex, std::string>> rows;
        const auto doc = nlohmann::json::parse(embedded::openapi_json());
        for (const auto& [pattern, operations] : doc.at("paths").items()) {
            // "/v1/items/{item}" -> "/v1/items/(.+)"
            const std::string regex = std::regex_replace(pattern, std::regex(R"(\{[^}]+\})"), "(.+)");
            std::string allow;
            for (const char* method : {"get", "post", "put", "patch", "delete"}) {
                if (!operations.contains(method)) continue;
                std::string upper(method);
                for (char& c : upper) c = static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
                allow += (allow.empty() ? "" : ", ") + upper + (upper == "GET" ? ", HEAD" : "");
            }
            rows.emplace_back(std::regex(regex), allow);
        }
        return rows;
    }();
    for (const auto& [regex, allow] : table)
        if (std::regex_match(path, regex)) return allow;
    return {};
}

// Whether `method` is one of an Allow value's ("GET, HEAD").
bool allows(std::string_view allow, std::string_view method) {
    for (size_t start = 0; start < allow.size();) {
        const size_t comma = std::min(allow.find(", ", start), allow.size());
        if (allow.substr(start, comma - start) == method) return true;
        start = comma + 2;
    }
    return false;
}

// Counts and logs a request no route handler saw (handlers do both themselves).
void count_unrouted(AppContext& ctx, std::string_view method, std::string_view route, int status,
                    std::string_view target) {
    ctx.metrics.request_started();
    ctx.metrics.request_finished(std::string(route), status, 0.0);
    if (ctx.options.access_log)
        log_access(method.empty() ? "-" : method, route, status, 0.0,
                   ctx.options.log_ids ? target : std::string_view());
}

}  // namespace

void install_all_routes(httplib::Server& server, AppContext& ctx) {
    install_health_routes(server, ctx);
    install_prediction_routes(server, ctx);
    install_recommendation_routes(server, ctx);
    install_item_routes(server, ctx);
    install_admin_routes(server, ctx);
    install_console_routes(server, ctx);

    server.Get("/metrics", wrap_route(ctx, "/metrics", [&ctx](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const auto model = ctx.slot.get();
                   res.set_content(ctx.metrics.render(model.get()), "text/plain; version=0.0.4; charset=utf-8");
               }));

    // Compiled in (generated/openapi_json.hpp): the document is part of the
    // build, not of the model, and an installed binary has no source tree.
    server.Get("/v1/openapi.json", wrap_route(ctx, "/v1/openapi.json", [](const httplib::Request& req, httplib::Response& res) {
                   check_query_names(req, {});
                   const std::string_view document = embedded::openapi_json();
                   res.set_content(document.data(), document.size(), "application/json");
               }));

    // Requests no handler answered (unknown route, 413 from the body limit,
    // 400 from a malformed request line): give them a problem document too.
    server.set_error_handler(httplib::Server::HandlerWithResponse([&ctx](const httplib::Request& req, httplib::Response& res) {
        if (res.get_header_value("Content-Type") == kProblemContentType) return httplib::Server::HandlerResponse::Unhandled;
        const int status = res.status;
        std::string detail;
        std::string slug = "http-" + std::to_string(status);
        if (const std::string allow = allowed_methods(req.path);
            !allow.empty() && !allows(allow, req.method) && (status == 404 || status == 400)) {
            // The path exists but not for this method (RFC 9110 section 15.5.6).
            // (A path the document's pattern matches but no route does, such
            // as /console/a/b, stays a 404.)
            res.set_header("Allow", allow);
            write_problem(res, 405, "method-not-allowed", status_title(405),
                          req.method + " is not allowed on " + req.path + "; allowed: " + allow, req.target);
            count_unrouted(ctx, req.method, "unmatched", 405, req.target);
            return httplib::Server::HandlerResponse::Handled;
        }
        if (status == 404) {
            slug = "no-route";
            detail = "no route " + req.method + " " + req.path + "; see /v1/openapi.json for the routes";
        } else if (status == 413) {
            slug = "body-too-large";
            detail = "the request body exceeds the server's limit of " + std::to_string(ctx.options.body_limit_bytes) +
                     " bytes; send a smaller batch";
        } else if (status == 405) {
            detail = req.method + " is not allowed on " + req.path;
        } else {
            detail = "the request could not be processed (" + std::string(status_title(status)) + ")";
        }
        write_problem(res, status, slug, status_title(status), detail, req.target);
        count_unrouted(ctx, req.method, "unmatched", status, req.target);
        return httplib::Server::HandlerResponse::Handled;
    }));
    server.set_exception_handler([](const httplib::Request& req, httplib::Response& res, std::exception_ptr) {
        write_problem(res, 500, "internal", "Internal Server Error", "the server failed to answer this request",
                      req.target);
    });
}

namespace {

ListenerLimits listener_limits(const ServeOptions& o) {
    // Each connection holds a worker while its request arrives and is
    // answered; idle workers cost little.
    const uint32_t threads = o.threads ? o.threads : std::max(16u, 4 * std::max(1u, std::thread::hardware_concurrency()));
    return ListenerLimits{
        .gate = GateLimits{.header_line_limit_bytes = o.header_line_limit_bytes,
                           .header_count_limit = o.header_count_limit,
                           .body_limit_bytes = o.body_limit_bytes,
                           .form_body_limit_bytes = GateLimits{}.form_body_limit_bytes},
        .threads = threads,
        .connection_limit = o.connection_limit,
        .listen_backlog = o.listen_backlog,
        .request_deadline_ms = o.request_deadline_ms,
        .read_timeout_ms = o.read_timeout_ms,
        .write_timeout_ms = o.write_timeout_ms,
        .keep_alive_timeout_ms = o.keep_alive_timeout_ms,
        .keep_alive_max_requests = o.keep_alive_max_requests,
    };
}

// SIGHUP also re-reads the API token file (rotation without a restart); a
// file that no longer parses leaves the previous tokens in force.
void reload_api_tokens(AppContext& ctx) {
    if (ctx.options.api_tokens_file.empty()) return;
    try {
        ApiTokens tokens = ApiTokens::load(ctx.options.api_tokens_file);
        const size_t count = tokens.size();
        ctx.access.replace_tokens(std::move(tokens));
        server_log().info("API tokens reloaded: {} tokens", count);
    } catch (const Error& e) {
        server_log().error("API token reload failed, the previous tokens stay: {}", e.what());
    }
}

// Reads the options and tokens into ctx. Returns 0, or the exit code of a
// refusal it has logged (2 for a usage problem, 1 for an unreadable file).
int prepare_context(AppContext& ctx, const ServeOptions& options) {
    ctx.options = options;
    try {
        validate_serve_options(options);
        ctx.admin_token = resolve_admin_token(options);
        ctx.access.configure(options, options.api_tokens_file.empty() ? ApiTokens{} : ApiTokens::load(options.api_tokens_file));
    } catch (const OptionError& e) {
        server_log().error("{}", e.what());
        return 2;  // usage, as the CLI's exit codes (cli/main.cpp)
    } catch (const Error& e) {
        server_log().error("{}", e.what());
        return 1;
    }
    return 0;
}

// What the signal thread and run_server share while the server runs.
struct StopState {
    std::atomic<bool> stop_requested{false};
    std::chrono::steady_clock::time_point stop_started{};  // written by the signal thread before stop()
    std::atomic<bool> listen_returned{false};
};

// The signal thread: SIGHUP reloads the model and the tokens; SIGINT and
// SIGTERM stop the server gracefully. Only this thread calls server.stop(),
// and only once the server runs (httplib ignores a stop() before listen).
void watch_signals(HttpListener& server, AppContext& ctx, const sigset_t& handled, StopState& state) {
    const timespec tick{0, 50'000'000};
    while (!state.listen_returned) {
        const int sig = sigtimedwait(&handled, nullptr, &tick);
        if (sig == SIGHUP) {
            // Reloading here keeps it off the request path; requests keep
            // the old model until the swap.
            const auto current = ctx.slot.get();
            const std::string path = current ? current->source_path : ctx.options.model_path;
            try {
                ctx.reload(path);
            } catch (const std::exception& e) {
                server_log().error("reload on SIGHUP failed, still serving the previous model: {}", e.what());
            }
            reload_api_tokens(ctx);
        } else if (sig == SIGINT || sig == SIGTERM) {
            // Graceful: stop() closes the listening socket at once (new
            // connections are refused, so a proxy tries another replica);
            // listen_after_bind() returns once every worker has answered
            // the request it is on (idle keep-alive connections close).
            server_log().info("serve: stopping on signal {}; answering the requests in flight", sig);
            state.stop_started = std::chrono::steady_clock::now();
            state.stop_requested = true;
        }
        if (state.stop_requested && server.is_running()) {
            server.stop();
            break;
        }
    }
}

}  // namespace

int run_server(const ServeOptions& options) {
    use_json_logs(options.log_json);
    AppContext ctx;
    if (const int refused = prepare_context(ctx, options); refused != 0) return refused;

    // Block the signals we handle in every thread started from here on; one
    // thread waits for them synchronously (no async-signal-safety pitfalls).
    sigset_t handled, previous;
    sigemptyset(&handled);
    sigaddset(&handled, SIGINT);
    sigaddset(&handled, SIGTERM);
    sigaddset(&handled, SIGHUP);
    pthread_sigmask(SIG_BLOCK, &handled, &previous);

    HttpListener server(listener_limits(options), ListenerHooks{
                                                      .connection_refused =
                                                          [&ctx](const RequestLine& request) {
                                                              ctx.metrics.connection_refused();
                                                              if (ctx.options.access_log)
                                                                  log_access(request.method.empty() ? "-" : request.method,
                                                                             "connection_limit", 503, 0.0,
                                                                             ctx.options.log_ids ? request.target : "");
                                                          },
                                                      .request_rejected =
                                                          [&ctx](const GateRejection& why, const RequestLine& request) {
                                                              count_unrouted(ctx, request.method, "gate", why.status,
                                                                             request.target);
                                                          },
                                                  });
    ctx.metrics.watch_open_connections([&server] { return server.open_connections(); });
    // Small JSON answers must not wait for the peer's delayed ACK (~40 ms).
    server.set_tcp_nodelay(true);
    install_all_routes(server, ctx);

    int port = 0;
    try {
        port = server.bind(options.host, options.port);
    } catch (const Error& e) {
        server_log().error("{}", e.what());
        pthread_sigmask(SIG_SETMASK, &previous, nullptr);
        return 1;
    }
    std::cout << "listening on http://" << options.host << ":" << port << std::endl;
    server_log().info("credence {} serving on http://{}:{}; kernels {}", kCredenceVersion, options.host, port,
                      cpu_level_description());

    StopState state;
    std::atomic<int> exit_code{0};
    std::thread loader([&] {
        try {
            ctx.reload(options.model_path);
        } catch (const std::exception& e) {
            server_log().error("serve: cannot load model {}: {}", options.model_path, e.what());
            exit_code = 1;
            state.stop_requested = true;
        }
    });
    std::thread signals([&] { watch_signals(server, ctx, handled, state); });

    server.listen_after_bind();
    state.listen_returned = true;
    loader.join();
    signals.join();
    // A signal that came while stopping (a supervisor's second SIGTERM) is
    // part of this stop: take it, so restoring the mask does not deliver it.
    const timespec no_wait{0, 0};
    while (sigtimedwait(&handled, nullptr, &no_wait) > 0) {
    }
    if (state.stop_started != std::chrono::steady_clock::time_point{})
        server_log().info("serve: stopped {:.0f} ms after the signal, every request in flight answered",
                          std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - state.stop_started)
                              .count());
    pthread_sigmask(SIG_SETMASK, &previous, nullptr);
    return exit_code;
}

}  // namespace credence::server
