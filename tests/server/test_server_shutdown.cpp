// Tests for the graceful stop of run_server (server/server.hpp): after
// SIGTERM the listening socket is closed at once, so new connections are
// refused, while a request already being answered (here one whose body
// arrives slowly, over a raw socket) still gets its whole answer; then the
// process exits 0.
#include <catch2/catch.hpp>

#include <arpa/inet.h>
#include <netinet/in.h>
#include <sys/socket.h>
#include <unistd.h>

#include <cerrno>
#include <chrono>
#include <csignal>
#include <string>
#include <thread>

#include <nlohmann/json.hpp>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;
using namespace credence::testing;
namespace fs = std::filesystem;
using nlohmann::json;

namespace {

// A loopback TCP connection; fd() is -1 and error() the errno when refused.
class Connection {
public:
    explicit Connection(int port) {
        fd_ = ::socket(AF_INET, SOCK_STREAM, 0);
        sockaddr_in addr{};
        addr.sin_family = AF_INET;
        addr.sin_port = htons(static_cast<uint16_t>(port));
        addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
        if (::connect(fd_, reinterpret_cast<const sockaddr*>(&addr), sizeof addr) != 0) {
            error_ = errno;
            ::close(fd_);
            fd_ = -1;
        }
    }
    ~Connection() {
        if (fd_ >= 0) ::close(fd_);
    }
    Connection(const Connection&) = delete;
    Connection& operator=(const Connection&) = delete;

    int fd() const { return fd_; }
    int error() const { return error_; }
    bool send_all(const std::string& bytes) const {
        size_t sent = 0;
        while (sent < bytes.size()) {
            const ssize_t n = ::send(fd_, bytes.data() + sent, bytes.size() - sent, MSG_NOSIGNAL);
            if (n <= 0) return false;
            sent += static_cast<size_t>(n);
        }
        return true;
    }
    // Everything until the server closes the connection (bounded by a 10 s receive timeout).
    std::string read_to_end() const {
        timeval timeout{10, 0};
        ::setsockopt(fd_, SOL_SOCKET, SO_RCVTIMEO, &timeout, sizeof timeout);
        std::string out;
        char buffer[4096];
        for (ssize_t n; (n = ::recv(fd_, buffer, sizeof buffer, 0)) > 0;) out.append(buffer, static_cast<size_t>(n));
        return out;
    }

private:
    int fd_ = -1;
    int error_ = 0;
};

}  // namespace

TEST_CASE("SIGTERM refuses new connections and still answers the request in flight") {
    const fs::path dir = scratch_dir("server_shutdown");
    SimulatedPosteriorOptions spec{.users = 20, .items = 30, .rank = 3, .samples = 6, .chains = 2};
    spec.id_digits = 5;  // "cust-00003", "sku-00004"
    const fs::path model = dir / "shop.posterior";
    write_posterior(simulate_posterior(spec), model.string());
    // read_timeout_ms bounds how long the server waits for the rest of the body.
    ServerProcess server(dir, model, "read_timeout_ms = 8000\naccess_log = true\n");

    const std::string body = R"({"pairs":[{"user":"cust-00003","item":"sku-00004"}]})";
    Connection slow(server.port());
    REQUIRE(slow.fd() >= 0);
    // The headers and half the body: the server is now reading this request.
    REQUIRE(slow.send_all("POST /v1/predictions HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\n"
                          "Content-Length: " + std::to_string(body.size()) + "\r\n\r\n" +
                          body.substr(0, body.size() / 2)));
    std::this_thread::sleep_for(std::chrono::milliseconds(200));

    server.signal(SIGTERM);
    // New connections are refused soon after the signal (the signal thread
    // looks every 50 ms; allow 5 s on a busy machine).
    int refused_error = 0;
    const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(5);
    while (std::chrono::steady_clock::now() < deadline) {
        Connection probe(server.port());
        if (probe.fd() < 0) {
            refused_error = probe.error();
            break;
        }
        std::this_thread::sleep_for(std::chrono::milliseconds(20));
    }
    CHECK(refused_error == ECONNREFUSED);

    // The rest of the body: the request in flight is answered in full.
    REQUIRE(slow.send_all(body.substr(body.size() / 2)));
    const std::string response = slow.read_to_end();
    INFO(response);
    REQUIRE(response.rfind("HTTP/1.1 200", 0) == 0);
    const auto body_at = response.find("\r\n\r\n");
    REQUIRE(body_at != std::string::npos);
    const json answer = json::parse(response.substr(body_at + 4));
    REQUIRE(answer.at("predictions").size() == 1);
    CHECK(answer["predictions"][0].at("mean").is_number());

    // Then the process ends by itself, with 0, and says so.
    CHECK(server.wait_for_exit() == 0);
    INFO(server.log());
    CHECK(server.log().find("every request in flight answered") != std::string::npos);
}
