// run_server: binds, loads the model off the request path, serves until
// SIGINT/SIGTERM, reloads on SIGHUP. Also installs the routes that belong to
// no group (/metrics, /v1/openapi.json) and the problem answers for requests
// that reach no handler (unknown route, body too large, malformed request).
#include "server/server.hpp"

#include <chrono>
#include <csignal>
#include <cstdio>
#include <iostream>
#include <string_view>
#include <thread>

#include <pthread.h>
#include <spdlog/spdlog.h>

#include "generated/credence_version.hpp"
#include "generated/openapi_json.hpp"
#include "model/error.hpp"
#include "server/app.hpp"
#include "server/logging.hpp"

namespace credence::server {

void install_all_routes(httplib::Server& server, AppContext& ctx) {
    install_health_routes(server, ctx);
    install_prediction_routes(server, ctx);
    install_recommendation_routes(server, ctx);
    install_item_routes(server, ctx);
    install_admin_routes(server, ctx);

    server.Get("/metrics", wrap_route(ctx, "/metrics", [&ctx](const httplib::Request&, httplib::Response& res) {
                   const auto model = ctx.slot.get();
                   res.set_content(ctx.metrics.render(model.get()), "text/plain; version=0.0.4; charset=utf-8");
               }));

    // Compiled in (generated/openapi_json.hpp): the document is part of the
    // build, not of the model, and an installed binary has no source tree.
    server.Get("/v1/openapi.json", wrap_route(ctx, "/v1/openapi.json", [](const httplib::Request&, httplib::Response& res) {
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
        // Handlers count themselves; these never reached one.
        ctx.metrics.request_started();
        ctx.metrics.request_finished("unmatched", status, 0.0);
        return httplib::Server::HandlerResponse::Handled;
    }));
    server.set_exception_handler([](const httplib::Request& req, httplib::Response& res, std::exception_ptr) {
        write_problem(res, 500, "internal", "Internal Server Error", "the server failed to answer this request",
                      req.target);
    });
}

int run_server(const ServeOptions& options) {
    use_json_logs(options.log_json);
    AppContext ctx;
    ctx.options = options;
    try {
        validate_serve_options(options);
        ctx.admin_token = resolve_admin_token(options);
    } catch (const OptionError& e) {
        server_log().error("{}", e.what());
        return 2;  // usage, as the CLI's exit codes (cli/main.cpp)
    } catch (const Error& e) {
        server_log().error("{}", e.what());
        return 1;
    }

    // Block the signals we handle in every thread started from here on; one
    // thread waits for them synchronously (no async-signal-safety pitfalls).
    sigset_t handled, previous;
    sigemptyset(&handled);
    sigaddset(&handled, SIGINT);
    sigaddset(&handled, SIGTERM);
    sigaddset(&handled, SIGHUP);
    pthread_sigmask(SIG_BLOCK, &handled, &previous);

    httplib::Server server;
    // Each open keep-alive connection holds a worker, so the default is
    // generous: idle workers cost little, starved connections cost seconds.
    const uint32_t threads =
        options.threads ? options.threads : std::max(16u, 4 * std::max(1u, std::thread::hardware_concurrency()));
    server.new_task_queue = [threads] { return new httplib::ThreadPool(threads); };
    // Small JSON answers must not wait for the peer's delayed ACK (~40 ms).
    server.set_tcp_nodelay(true);
    server.set_payload_max_length(options.body_limit_bytes);
    server.set_read_timeout(options.read_timeout_ms / 1000, (options.read_timeout_ms % 1000) * 1000);
    server.set_write_timeout(options.write_timeout_ms / 1000, (options.write_timeout_ms % 1000) * 1000);
    install_all_routes(server, ctx);

    int port = options.port;
    const bool bound = options.port == 0 ? (port = server.bind_to_any_port(options.host)) > 0
                                         : server.bind_to_port(options.host, options.port);
    if (!bound) {
        server_log().error("serve: cannot bind {}:{}; is the port in use or the host not local?", options.host,
                      options.port);
        pthread_sigmask(SIG_SETMASK, &previous, nullptr);
        return 1;
    }
    std::cout << "listening on http://" << options.host << ":" << port << std::endl;
    server_log().info("credence {} serving on http://{}:{}", kCredenceVersion, options.host, port);

    // Only the signal thread calls server.stop(), and only once the server
    // runs: httplib ignores a stop() that comes before listen starts.
    std::atomic<bool> stop_requested{false};
    std::chrono::steady_clock::time_point stop_started{};  // written by the signal thread before stop()
    std::atomic<bool> listen_returned{false};
    std::atomic<int> exit_code{0};
    std::thread loader([&] {
        try {
            ctx.reload(options.model_path);
        } catch (const std::exception& e) {
            server_log().error("serve: cannot load model {}: {}", options.model_path, e.what());
            exit_code = 1;
            stop_requested = true;
        }
    });
    std::thread signals([&] {
        const timespec tick{0, 50'000'000};
        while (!listen_returned) {
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
            } else if (sig == SIGINT || sig == SIGTERM) {
                // Graceful: stop() closes the listening socket at once (new
                // connections are refused, so a proxy tries another replica);
                // listen_after_bind() returns once every worker has answered
                // the request it is on (idle keep-alive connections close).
                server_log().info("serve: stopping on signal {}; answering the requests in flight", sig);
                stop_started = std::chrono::steady_clock::now();
                stop_requested = true;
            }
            if (stop_requested && server.is_running()) {
                server.stop();
                break;
            }
        }
    });

    server.listen_after_bind();
    listen_returned = true;
    loader.join();
    signals.join();
    // A signal that came while stopping (a supervisor's second SIGTERM) is
    // part of this stop: take it, so restoring the mask does not deliver it.
    const timespec no_wait{0, 0};
    while (sigtimedwait(&handled, nullptr, &no_wait) > 0) {
    }
    if (stop_started != std::chrono::steady_clock::time_point{})
        server_log().info("serve: stopped {:.0f} ms after the signal, every request in flight answered",
                          std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - stop_started)
                              .count());
    pthread_sigmask(SIG_SETMASK, &previous, nullptr);
    return exit_code;
}

}  // namespace credence::server
