// A raw TCP connection to a test server on loopback, for requests no HTTP
// client library would send (broken framing, endless header lines, bytes
// trickled one at a time) and for timing how the server answers them.
#pragma once
#include <arpa/inet.h>
#include <netinet/in.h>
#include <netinet/tcp.h>
#include <poll.h>
#include <sys/socket.h>
#include <unistd.h>

#include <chrono>
#include <cstring>
#include <stdexcept>
#include <string>
#include <string_view>

namespace credence::testing {

class RawConnection {
public:
    // Connects to host:port (a loopback address); throws std::runtime_error
    // when it cannot. `source` binds the local end to another loopback
    // address first (127.0.0.2 ...), so tests can act as several clients.
    explicit RawConnection(int port, const std::string& host = "127.0.0.1", const std::string& source = "") {
        fd_ = ::socket(AF_INET, SOCK_STREAM, 0);
        if (fd_ < 0) throw std::runtime_error("socket failed");
        if (!source.empty()) {
            sockaddr_in local{};
            local.sin_family = AF_INET;
            inet_pton(AF_INET, source.c_str(), &local.sin_addr);
            if (::bind(fd_, reinterpret_cast<sockaddr*>(&local), sizeof local) != 0)
                throw std::runtime_error("bind to " + source + " failed");
        }
        sockaddr_in addr{};
        addr.sin_family = AF_INET;
        addr.sin_port = htons(static_cast<uint16_t>(port));
        inet_pton(AF_INET, host.c_str(), &addr.sin_addr);
        if (::connect(fd_, reinterpret_cast<sockaddr*>(&addr), sizeof addr) != 0) {
            ::close(fd_);
            throw std::runtime_error("connect failed: " + std::string(std::strerror(errno)));
        }
        int yes = 1;
        setsockopt(fd_, IPPROTO_TCP, TCP_NODELAY, &yes, sizeof yes);
    }
    ~RawConnection() { close(); }
    RawConnection(const RawConnection&) = delete;
    RawConnection& operator=(const RawConnection&) = delete;
    RawConnection(RawConnection&& other) noexcept : fd_(other.fd_) { other.fd_ = -1; }

    // Sends all of `data`; false when the peer closed or reset the connection.
    bool send(std::string_view data) {
        while (!data.empty()) {
            const ssize_t n = ::send(fd_, data.data(), data.size(), MSG_NOSIGNAL);
            if (n <= 0) return false;
            data.remove_prefix(static_cast<size_t>(n));
        }
        return true;
    }

    // Reads until the peer closes, `timeout_ms` passes or `until` appears
    // (when not empty). Returns what arrived.
    std::string receive(int timeout_ms, std::string_view until = {}) {
        std::string got;
        const auto deadline = std::chrono::steady_clock::now() + std::chrono::milliseconds(timeout_ms);
        for (;;) {
            const auto left = std::chrono::duration_cast<std::chrono::milliseconds>(
                                  deadline - std::chrono::steady_clock::now())
                                  .count();
            if (left <= 0) break;
            pollfd p{fd_, POLLIN, 0};
            if (::poll(&p, 1, static_cast<int>(left)) <= 0) break;
            char buf[65536];
            const ssize_t n = ::recv(fd_, buf, sizeof buf, 0);
            if (n <= 0) {
                closed_by_peer_ = true;
                break;
            }
            got.append(buf, static_cast<size_t>(n));
            if (!until.empty() && got.find(until) != std::string::npos) break;
        }
        return got;
    }

    // True once receive() saw the peer close (or reset) the connection.
    bool closed_by_peer() const { return closed_by_peer_; }

    // Whether the peer has closed: waits up to timeout_ms for EOF.
    bool wait_closed(int timeout_ms) {
        receive(timeout_ms);
        return closed_by_peer_;
    }

    void close() {
        if (fd_ >= 0) ::close(fd_);
        fd_ = -1;
    }
    int fd() const { return fd_; }

private:
    int fd_ = -1;
    bool closed_by_peer_ = false;
};

// The status code of the first response in `text` ("HTTP/1.1 413 ..."), or 0.
inline int status_of(const std::string& text) {
    if (text.rfind("HTTP/1.", 0) != 0 || text.size() < 12) return 0;
    return std::stoi(text.substr(9, 3));
}

}  // namespace credence::testing
