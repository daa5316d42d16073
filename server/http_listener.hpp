// The listening socket and every connection's life: a cpp-httplib Server
// whose connections pass through the request gate (server/request_gate.hpp)
// and a bounded worker pool. Used by run_server (server/server.cpp); the
// routes are installed on it as on any httplib::Server. HTTP/1.1 per RFC 9112.
//
// What it enforces in process, per connection:
//   - at most connection_limit connections open at once (being answered or
//     waiting for a worker); the next one gets 503 at once and is closed;
//   - a connection that sends nothing for keep_alive_timeout_ms is closed;
//   - once a request's first byte arrives, its head and body must be complete
//     within request_deadline_ms (else 408), and no gap between bytes may
//     exceed read_timeout_ms (else 408);
//   - header line length and count, body size (Content-Length or chunked),
//     form body size, framing conflicts, as request_gate.hpp says;
//   - at most keep_alive_max_requests requests per connection;
//   - the socket binds without SO_REUSEPORT, so a port in use is an error,
//     and listens with a backlog of listen_backlog.
// What it cannot do: a worker is held while a request trickles in, so many
// slow clients still occupy workers until their deadline; the supported way
// to face the internet is behind the shipped proxy (config/nginx/credence.conf).
#pragma once
#include <atomic>
#include <cstdint>
#include <functional>
#include <string>

#include <httplib.h>

#include "server/request_gate.hpp"

namespace credence::server {

struct ListenerLimits {
    GateLimits gate;
    uint32_t threads = 16;
    uint32_t connection_limit = 256;
    uint32_t listen_backlog = 1024;
    uint32_t request_deadline_ms = 10000;
    uint32_t read_timeout_ms = 5000;
    uint32_t write_timeout_ms = 5000;
    uint32_t keep_alive_timeout_ms = 5000;
    uint32_t keep_alive_max_requests = 100;
};

// What the listener reports as it goes (may be empty). Called from worker
// threads and the accept thread; the callee guards its own state.
struct ListenerHooks {
    // Over connection_limit: 503 sent. The request line when its first bytes
    // had already arrived whole, else empty fields.
    std::function<void(const RequestLine&)> connection_refused;
    // Refused by the gate (status sent); the request line as for connection_refused.
    std::function<void(const GateRejection&, const RequestLine&)> request_rejected;
};

class HttpListener : public httplib::Server {
public:
    HttpListener(ListenerLimits limits, ListenerHooks hooks);

    // Binds host:port (port 0: a free port). Returns the bound port. Throws
    // FileError naming the host and port when the port is in use ("port 8080
    // on 127.0.0.1 is already in use ...") or cannot be bound.
    int bind(const std::string& host, uint16_t port);

    // Connections open now (in work or waiting for a worker).
    uint32_t open_connections() const { return open_connections_.load(); }

private:
    class BoundedPool;
    // Overrides httplib::Server's per-connection loop (a virtual member of
    // the class, private in 0.11.4; overriding it is the library's extension
    // point for socket handling, as its SSLServer does).
    bool process_and_close_socket(socket_t sock) override;
    // What a connection does after a request.
    enum class Next { keep_alive, close, linger };
    // Reads one request through the gate and answers it; `pending` holds
    // bytes already received for it and keeps what arrived beyond it.
    Next serve_one(socket_t sock, std::string& pending, uint32_t served);
    // Answers a refused request with its problem document.
    Next reject(socket_t sock, const GateRejection& why, const RequestLine& request);

    ListenerLimits limits_;
    ListenerHooks hooks_;
    std::atomic<uint32_t> open_connections_{0};  // maintained by BoundedPool
};

}  // namespace credence::server
