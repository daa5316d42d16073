#include "server/http_listener.hpp"

#include <arpa/inet.h>
#include <netinet/in.h>
#include <poll.h>
#include <sys/socket.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <condition_variable>
#include <cstring>
#include <deque>
#include <mutex>
#include <thread>
#include <vector>

#include "model/error.hpp"
#include "server/problem.hpp"

namespace credence::server {

namespace {

using Clock = std::chrono::steady_clock;

// Set by BoundedPool on the accept thread while it hands over a connection
// that is over the limit; process_and_close_socket then refuses it.
thread_local bool t_refuse_connection = false;

constexpr size_t kReceiveChunkBytes = 16 * 1024;
// How long a refused request's remaining upload is read and dropped after
// the answer, so the client sees the answer rather than a reset (common
// practice; nginx calls this lingering close).
constexpr auto kLingerTime = std::chrono::milliseconds(1000);

int poll_for(socket_t sock, short events, Clock::time_point deadline) {
    for (;;) {
        const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(deadline - Clock::now()).count();
        if (left <= 0) return 0;
        pollfd p{sock, events, 0};
        const int r = ::poll(&p, 1, static_cast<int>(std::min<long long>(left, 1000)));
        if (r > 0) return r;
        if (r < 0 && errno != EINTR) return -1;
    }
}

bool send_all(socket_t sock, std::string_view data, uint32_t timeout_ms) {
    const auto deadline = Clock::now() + std::chrono::milliseconds(timeout_ms);
    while (!data.empty()) {
        if (poll_for(sock, POLLOUT, deadline) <= 0) return false;
        const ssize_t sent = ::send(sock, data.data(), data.size(), MSG_NOSIGNAL);
        if (sent < 0) {
            if (errno == EINTR || errno == EAGAIN) continue;
            return false;
        }
        data.remove_prefix(static_cast<size_t>(sent));
    }
    return true;
}

std::string response_text(int status, const std::string& body) {
    return "HTTP/1.1 " + std::to_string(status) + " " + status_title(status) +
           "\r\nContent-Type: " + kProblemContentType + "\r\nContent-Length: " + std::to_string(body.size()) +
           "\r\nConnection: close\r\n\r\n" + body;
}

std::string problem_text(const GateRejection& r, const std::string& instance) {
    return response_text(r.status, problem_json(r.status, r.slug, status_title(r.status), r.detail, instance)
                                       .dump(-1, ' ', false, nlohmann::json::error_handler_t::replace));
}

// Sends FIN, then reads and drops what the peer still sends for a short
// while, then closes.
void lingering_close(socket_t sock) {
    ::shutdown(sock, SHUT_WR);
    const auto until = Clock::now() + kLingerTime;
    char sink[kReceiveChunkBytes];
    while (poll_for(sock, POLLIN, until) > 0) {
        const ssize_t got = ::recv(sock, sink, sizeof sink, 0);
        if (got <= 0) break;
    }
    ::close(sock);
}

std::string address_text(const sockaddr_storage& addr, int& port) {
    char text[INET6_ADDRSTRLEN] = {0};
    if (addr.ss_family == AF_INET) {
        const auto* a = reinterpret_cast<const sockaddr_in*>(&addr);
        inet_ntop(AF_INET, &a->sin_addr, text, sizeof text);
        port = ntohs(a->sin_port);
    } else if (addr.ss_family == AF_INET6) {
        const auto* a = reinterpret_cast<const sockaddr_in6*>(&addr);
        inet_ntop(AF_INET6, &a->sin6_addr, text, sizeof text);
        port = ntohs(a->sin6_port);
    }
    return text;
}

// A whole request already received (by the gate) as httplib's input; the
// answer goes straight to the socket.
class BufferedStream final : public httplib::Stream {
public:
    BufferedStream(socket_t sock, std::string request, uint32_t write_timeout_ms)
        : sock_(sock), request_(std::move(request)), write_timeout_ms_(write_timeout_ms) {}

    bool is_readable() const override { return read_at_ < request_.size(); }
    bool is_writable() const override {
        return poll_for(sock_, POLLOUT, Clock::now() + std::chrono::milliseconds(write_timeout_ms_)) > 0;
    }
    ssize_t read(char* ptr, size_t size) override {
        const size_t n = std::min(size, request_.size() - read_at_);
        std::memcpy(ptr, request_.data() + read_at_, n);
        read_at_ += n;
        return static_cast<ssize_t>(n);
    }
    ssize_t write(const char* ptr, size_t size) override {
        if (!is_writable()) return -1;
        for (;;) {
            const ssize_t sent = ::send(sock_, ptr, size, MSG_NOSIGNAL);
            if (sent >= 0 || (errno != EINTR && errno != EAGAIN)) return sent;
        }
    }
    void get_remote_ip_and_port(std::string& ip, int& port) const override {
        sockaddr_storage addr{};
        socklen_t len = sizeof addr;
        if (getpeername(sock_, reinterpret_cast<sockaddr*>(&addr), &len) == 0) ip = address_text(addr, port);
    }
    void get_local_ip_and_port(std::string& ip, int& port) const override {
        sockaddr_storage addr{};
        socklen_t len = sizeof addr;
        if (getsockname(sock_, reinterpret_cast<sockaddr*>(&addr), &len) == 0) ip = address_text(addr, port);
    }
    socket_t socket() const override { return sock_; }

private:
    socket_t sock_;
    std::string request_;
    size_t read_at_ = 0;
    uint32_t write_timeout_ms_;
};

enum class Received { bytes, timeout, closed };

// Receives up to `most` more bytes into `into`, waiting no longer than the
// request deadline or the gap limit.
Received receive_more(socket_t sock, std::string& into, Clock::time_point deadline, uint32_t gap_ms, size_t most) {
    const auto gap_deadline = std::min(deadline, Clock::now() + std::chrono::milliseconds(gap_ms));
    const int ready = poll_for(sock, POLLIN, gap_deadline);
    if (ready == 0) return Received::timeout;
    if (ready < 0) return Received::closed;
    const size_t before = into.size();
    into.resize(before + most);
    ssize_t got;
    do {
        got = ::recv(sock, into.data() + before, most, 0);
    } while (got < 0 && errno == EINTR);
    into.resize(before + static_cast<size_t>(std::max<ssize_t>(got, 0)));
    return got > 0 ? Received::bytes : Received::closed;
}

}  // namespace

// A fixed set of workers and a queue; connections beyond the limit (in work
// plus queued) are refused on the accept thread.
class HttpListener::BoundedPool final : public httplib::TaskQueue {
public:
    BoundedPool(uint32_t threads, uint32_t limit, std::atomic<uint32_t>& open) : limit_(limit), open_(open) {
        for (uint32_t k = 0; k < threads; ++k) workers_.emplace_back([this] { work(); });
    }
    ~BoundedPool() override { shutdown(); }

    void enqueue(std::function<void()> fn) override {
        {
            std::lock_guard lock(mutex_);
            if (open_.load() < limit_ && !stopping_) {
                open_.fetch_add(1);
                jobs_.push_back(std::move(fn));
                ready_.notify_one();
                return;
            }
        }
        t_refuse_connection = true;
        fn();
        t_refuse_connection = false;
    }

    void shutdown() override {
        {
            std::lock_guard lock(mutex_);
            if (stopping_ && workers_.empty()) return;
            stopping_ = true;
        }
        ready_.notify_all();
        for (auto& worker : workers_)
            if (worker.joinable()) worker.join();
        workers_.clear();
    }

private:
    void work() {
        for (;;) {
            std::function<void()> job;
            {
                std::unique_lock lock(mutex_);
                ready_.wait(lock, [this] { return stopping_ || !jobs_.empty(); });
                if (jobs_.empty()) return;  // stopping and drained
                job = std::move(jobs_.front());
                jobs_.pop_front();
            }
            job();
            open_.fetch_sub(1);
        }
    }

    const uint32_t limit_;
    std::atomic<uint32_t>& open_;     // connections queued or in work
    std::mutex mutex_;                // guards jobs_ and stopping_
    std::condition_variable ready_;
    std::deque<std::function<void()>> jobs_;
    bool stopping_ = false;
    std::vector<std::thread> workers_;  // touched by the owner thread only
};

HttpListener::HttpListener(ListenerLimits limits, ListenerHooks hooks)
    : limits_(std::move(limits)), hooks_(std::move(hooks)) {
    new_task_queue = [this] { return new BoundedPool(limits_.threads, limits_.connection_limit, open_connections_); };
    // SO_REUSEADDR only (rebinding past TIME_WAIT); no SO_REUSEPORT, which
    // would let a second server share the port and its traffic.
    set_socket_options([](socket_t sock) {
        int yes = 1;
        setsockopt(sock, SOL_SOCKET, SO_REUSEADDR, &yes, sizeof yes);
    });
    set_read_timeout(limits_.read_timeout_ms / 1000, (limits_.read_timeout_ms % 1000) * 1000);
    set_write_timeout(limits_.write_timeout_ms / 1000, (limits_.write_timeout_ms % 1000) * 1000);
    set_payload_max_length(limits_.gate.body_limit_bytes);
    // Only for the Keep-Alive header the library writes; the gate enforces both.
    set_keep_alive_max_count(limits_.keep_alive_max_requests);
    set_keep_alive_timeout(std::max<time_t>(1, limits_.keep_alive_timeout_ms / 1000));
}

int HttpListener::bind(const std::string& host, uint16_t port) {
    errno = 0;
    const int bound = port == 0 ? bind_to_any_port(host) : (bind_to_port(host, port) ? port : -1);
    if (bound <= 0) {
        const int error = errno;
        if (error == EADDRINUSE)
            throw FileError("serve: port " + std::to_string(port) + " on " + host +
                            " is already in use (another credence serve?); stop that process or choose another "
                            "port with --port or [serve] port");
        throw FileError("serve: cannot bind " + host + ":" + std::to_string(port) + ": " +
                        (error ? std::strerror(error) : "the address is not local or cannot be resolved"));
    }
    // The library listens with a backlog of 5; listen() again sets ours.
    ::listen(svr_sock_, static_cast<int>(limits_.listen_backlog));
    return bound;
}

bool HttpListener::process_and_close_socket(socket_t sock) {
    if (t_refuse_connection) {
        // Over the limit: drop what already arrived, answer 503, close.
        // The first chunk is kept to name the request in the log and the answer.
        char sink[kReceiveChunkBytes];
        std::string arrived;
        for (ssize_t got = 0; (got = ::recv(sock, sink, sizeof sink, MSG_DONTWAIT)) > 0;)
            if (arrived.empty()) arrived.assign(sink, static_cast<size_t>(got));
        const RequestLine request = peek_request_line(arrived, limits_.gate);
        const std::string body =
            problem_json(503, "too-many-connections", "Service Unavailable",
                         "the server has " + std::to_string(limits_.connection_limit) +
                             " connections open, its limit; retry shortly",
                         request.target)
                .dump();
        const std::string text = response_text(503, body);
        ::send(sock, text.data(), text.size(), MSG_NOSIGNAL | MSG_DONTWAIT);
        ::shutdown(sock, SHUT_WR);
        ::close(sock);
        if (hooks_.connection_refused) hooks_.connection_refused(request);
        return false;
    }
    std::string pending;  // bytes received beyond the previous request (pipelining)
    uint32_t served = 0;
    Next next = Next::keep_alive;
    while (next == Next::keep_alive && svr_sock_ != INVALID_SOCKET && served < limits_.keep_alive_max_requests)
        next = serve_one(sock, pending, served++);
    if (next == Next::linger) {
        lingering_close(sock);
    } else {
        ::shutdown(sock, SHUT_WR);
        ::close(sock);
    }
    return true;
}

HttpListener::Next HttpListener::reject(socket_t sock, const GateRejection& why, const RequestLine& request) {
    send_all(sock, problem_text(why, request.target), limits_.write_timeout_ms);
    if (hooks_.request_rejected) hooks_.request_rejected(why, request);
    return Next::linger;
}

HttpListener::Next HttpListener::serve_one(socket_t sock, std::string& pending, uint32_t served) {
    const GateLimits& gate = limits_.gate;
    // Idle: wait for the request's first byte.
    if (pending.empty()) {
        const auto idle_until = Clock::now() + std::chrono::milliseconds(limits_.keep_alive_timeout_ms);
        if (receive_more(sock, pending, idle_until, limits_.keep_alive_timeout_ms, kReceiveChunkBytes) !=
            Received::bytes)
            return Next::close;
    }
    const auto deadline = Clock::now() + std::chrono::milliseconds(limits_.request_deadline_ms);
    const GateRejection too_slow{408, "request-timeout",
                                 "the request did not arrive whole within " +
                                     std::to_string(limits_.request_deadline_ms) + " ms (or paused longer than " +
                                     std::to_string(limits_.read_timeout_ms) + " ms); send it again"};

    // The head.
    HeadScan scan;
    for (;;) {
        scan = scan_head(pending, gate);
        if (scan.rejection) return reject(sock, *scan.rejection, peek_request_line(pending, gate));
        if (scan.complete) break;
        const Received r = receive_more(sock, pending, deadline, limits_.read_timeout_ms, kReceiveChunkBytes);
        if (r == Received::timeout) return reject(sock, too_slow, peek_request_line(pending, gate));
        if (r == Received::closed) return Next::close;
    }
    auto parsed = parse_head(std::string_view(pending).substr(0, scan.head_bytes), gate);
    if (auto* refused = std::get_if<GateRejection>(&parsed))
        return reject(sock, *refused, peek_request_line(pending, gate));
    ParsedHead& head = std::get<ParsedHead>(parsed);
    const RequestLine request{head.method, head.target};
    std::string rest = pending.substr(scan.head_bytes);
    pending.clear();
    if (head.expects_continue && head.framing.kind != BodyFraming::Kind::none)
        send_all(sock, "HTTP/1.1 100 Continue\r\n\r\n", limits_.write_timeout_ms);

    // The body.
    std::string body;
    if (head.framing.kind == BodyFraming::Kind::length) {
        const uint64_t length = head.framing.length;
        while (rest.size() < length) {
            const size_t want = static_cast<size_t>(std::min<uint64_t>(kReceiveChunkBytes * 4, length - rest.size()));
            const Received r = receive_more(sock, rest, deadline, limits_.read_timeout_ms, want);
            if (r == Received::timeout) return reject(sock, too_slow, request);
            if (r == Received::closed) return Next::close;
        }
        pending = rest.substr(length);
        rest.resize(length);
        body = std::move(rest);
    } else if (head.framing.kind == BodyFraming::Kind::chunked) {
        ChunkDecoder decoder(gate);
        size_t used = decoder.feed(rest, body);
        while (!decoder.done() && !decoder.rejection()) {
            rest.clear();
            const Received r = receive_more(sock, rest, deadline, limits_.read_timeout_ms, kReceiveChunkBytes * 4);
            if (r == Received::timeout) return reject(sock, too_slow, request);
            if (r == Received::closed) return Next::close;
            used = decoder.feed(rest, body);
        }
        if (decoder.rejection()) return reject(sock, *decoder.rejection(), request);
        if (head.form_encoded && body.size() > gate.form_body_limit_bytes)
            return reject(sock, form_body_too_large(gate), request);
        pending = rest.substr(used);
    } else {
        pending = std::move(rest);
    }

    // The whole request, in canonical form, to the library.
    BufferedStream stream(sock, canonical_request(head, body), limits_.write_timeout_ms);
    body = std::string();
    const bool last = served + 1 >= limits_.keep_alive_max_requests || svr_sock_ == INVALID_SOCKET;
    bool connection_closed = false;
    const bool written = process_request(stream, last, connection_closed, nullptr);
    return written && !connection_closed && !last ? Next::keep_alive : Next::close;
}

}  // namespace credence::server
