// The deployment the README tells users to expose: Debian's nginx with the
// shipped config/nginx/credence.conf, TLS with a certificate made here, in
// front of `credence serve` on loopback. Under 200 clients trickling a byte
// a second and 1,000 idle connections, a normal client's /v1/health and
// top-10 requests must keep a p99 under 100 ms; a 1 GB chunked upload and a
// 300 MB header line must leave the servers' memory under twice its idle
// size. Loopback only, about 30 s. Skips with a NOTICE when nginx or the
// openssl program is absent (scripts/setup.sh installs both).
#include <catch2/catch.hpp>

#include <openssl/err.h>
#include <openssl/ssl.h>
#include <signal.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cmath>
#include <chrono>
#include <fstream>
#include <iostream>
#include <memory>
#include <mutex>
#include <sstream>
#include <thread>
#include <vector>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/raw_http.hpp"
#include "tests/support/run_command.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;
using Clock = std::chrono::steady_clock;

namespace {

const std::string kToken = "exposed-shop-web-0123456789abcdef0123";

bool have_program(const std::string& name) {
    return std::system(("command -v " + name + " >/dev/null 2>&1").c_str()) == 0;
}

int free_port() {
    const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
    sockaddr_in addr{};
    addr.sin_family = AF_INET;
    addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
    ::bind(fd, reinterpret_cast<sockaddr*>(&addr), sizeof addr);
    socklen_t len = sizeof addr;
    ::getsockname(fd, reinterpret_cast<sockaddr*>(&addr), &len);
    ::close(fd);
    return ntohs(addr.sin_port);
}

std::string read_text(const fs::path& path) {
    std::ifstream in(path);
    std::ostringstream s;
    s << in.rdbuf();
    return s.str();
}

// Replaces the one occurrence of `from`; fails the test when the shipped file
// no longer has it (the test must follow the file).
void replace_once(std::string& text, const std::string& from, const std::string& to) {
    const auto at = text.find(from);
    INFO("config/nginx/credence.conf no longer contains: " << from);
    REQUIRE(at != std::string::npos);
    text.replace(at, from.size(), to);
}

// Resident set size of a process in KiB (VmRSS), 0 when it is gone.
uint64_t rss_kib(pid_t pid) {
    std::ifstream in("/proc/" + std::to_string(pid) + "/status");
    for (std::string line; std::getline(in, line);)
        if (line.rfind("VmRSS:", 0) == 0) return std::stoull(line.substr(6));
    return 0;
}

std::vector<pid_t> children_of(pid_t pid) {
    std::ifstream in("/proc/" + std::to_string(pid) + "/task/" + std::to_string(pid) + "/children");
    std::vector<pid_t> out;
    for (pid_t child; in >> child;) out.push_back(child);
    return out;
}

// nginx in the foreground with its own prefix, stopped at the end of the test.
class Nginx {
public:
    Nginx(const fs::path& dir, const std::string& site, int port) : port_(port) {
        for (const char* sub : {"body", "proxy", "fastcgi", "uwsgi", "scgi"}) fs::create_directories(dir / sub);
        std::ofstream(dir / "credence.conf") << site;
        // The main configuration the README asks for (worker_connections,
        // worker_rlimit_nofile), with every path inside the prefix.
        std::ofstream(dir / "nginx.conf")
            << "worker_processes 2;\nworker_rlimit_nofile 16384;\ndaemon off;\npid " << (dir / "nginx.pid").string()
            << ";\nerror_log " << (dir / "error.log").string() << " warn;\nevents { worker_connections 8192; }\n"
            << "http {\n  access_log off;\n"
            << "  client_body_temp_path " << (dir / "body").string() << ";\n"
            << "  proxy_temp_path " << (dir / "proxy").string() << ";\n"
            << "  fastcgi_temp_path " << (dir / "fastcgi").string() << ";\n"
            << "  uwsgi_temp_path " << (dir / "uwsgi").string() << ";\n"
            << "  scgi_temp_path " << (dir / "scgi").string() << ";\n"
            << "  include " << (dir / "credence.conf").string() << ";\n}\n";
        pid_ = fork();
        if (pid_ == 0) {
            const std::string prefix = dir.string() + "/", conf = (dir / "nginx.conf").string();
            execlp("nginx", "nginx", "-p", prefix.c_str(), "-c", conf.c_str(), static_cast<char*>(nullptr));
            _exit(127);
        }
        log_ = dir / "error.log";
        for (int k = 0; k < 200; ++k) {
            try {
                RawConnection probe(port_);
                return;
            } catch (const std::exception&) {
                std::this_thread::sleep_for(std::chrono::milliseconds(25));
            }
        }
        FAIL("nginx did not start; its log:\n" << read_text(log_));
    }
    ~Nginx() {
        ::kill(pid_, SIGQUIT);  // graceful stop of master and workers
        int status = 0;
        for (int k = 0; k < 100 && waitpid(pid_, &status, WNOHANG) == 0; ++k)
            std::this_thread::sleep_for(std::chrono::milliseconds(20));
        ::kill(pid_, SIGKILL);
        waitpid(pid_, &status, WNOHANG);
    }
    pid_t pid() const { return pid_; }
    std::string log() const { return read_text(log_); }

private:
    pid_t pid_ = -1;
    int port_;
    fs::path log_;
};

// A TLS connection made with OpenSSL directly, so a test can send a request
// one byte per TLS record.
class TlsConnection {
public:
    TlsConnection(SSL_CTX* ctx, int port) : tcp_(port) {
        ssl_ = SSL_new(ctx);
        SSL_set_fd(ssl_, tcp_.fd());
        SSL_set_tlsext_host_name(ssl_, "127.0.0.1");
        if (SSL_connect(ssl_) != 1) throw std::runtime_error("TLS handshake failed");
    }
    ~TlsConnection() { SSL_free(ssl_); }
    TlsConnection(const TlsConnection&) = delete;
    bool send(std::string_view data) {
        while (!data.empty()) {
            const int n = SSL_write(ssl_, data.data(), static_cast<int>(std::min<size_t>(data.size(), 1 << 20)));
            if (n <= 0) return false;
            data.remove_prefix(static_cast<size_t>(n));
        }
        return true;
    }
    std::string receive(int timeout_ms) {
        std::string got;
        const auto until = Clock::now() + std::chrono::milliseconds(timeout_ms);
        char buf[16384];
        while (Clock::now() < until) {
            if (SSL_pending(ssl_) == 0) {
                pollfd p{tcp_.fd(), POLLIN, 0};
                if (::poll(&p, 1, 50) <= 0) continue;
            }
            const int n = SSL_read(ssl_, buf, sizeof buf);
            if (n <= 0) break;
            got.append(buf, static_cast<size_t>(n));
            if (got.find("\r\n\r\n") != std::string::npos && got.size() > 200) break;
        }
        return got;
    }

private:
    RawConnection tcp_;
    SSL* ssl_ = nullptr;
};

double percentile(std::vector<double> values, double p) {
    std::sort(values.begin(), values.end());
    const size_t index = static_cast<size_t>(std::ceil(p * static_cast<double>(values.size()))) - 1;
    return values[std::min(index, values.size() - 1)];
}

// The largest RSS (KiB) seen for the credence process and the nginx workers
// while it runs, sampled every 10 ms.
class RssWatch {
public:
    RssWatch(pid_t credence, pid_t nginx) {
        thread_ = std::thread([this, credence, nginx] {
            while (!stop_) {
                uint64_t workers = 0;
                for (pid_t w : children_of(nginx)) workers = std::max(workers, rss_kib(w));
                credence_max_ = std::max<uint64_t>(credence_max_, rss_kib(credence));
                nginx_max_ = std::max<uint64_t>(nginx_max_, workers);
                std::this_thread::sleep_for(std::chrono::milliseconds(10));
            }
        });
    }
    ~RssWatch() { finish(); }
    void finish() {
        stop_ = true;
        if (thread_.joinable()) thread_.join();
    }
    uint64_t credence_max() const { return credence_max_; }
    uint64_t nginx_max() const { return nginx_max_; }

private:
    std::atomic<bool> stop_{false};
    std::atomic<uint64_t> credence_max_{0}, nginx_max_{0};
    std::thread thread_;
};

// Sends a chunked body of up to 1 GB in 64 KiB chunks until the peer stops
// taking it; returns the bytes sent and what came back.
template <typename Connection>
std::pair<uint64_t, std::string> huge_chunked_upload(Connection& c, const std::string& head) {
    const std::string chunk = "10000\r\n" + std::string(0x10000, '7') + "\r\n";
    uint64_t sent = 0;
    if (c.send(head))
        while (sent < (uint64_t{1} << 30) && c.send(chunk)) sent += 0x10000;
    return {sent, c.receive(3000)};
}

template <typename Connection>
std::pair<uint64_t, std::string> huge_header_line(Connection& c) {
    const std::string piece(0x10000, 'h');
    uint64_t sent = 0;
    if (c.send("GET /v1/health HTTP/1.1\r\nHost: 127.0.0.1\r\nX-Huge: "))
        while (sent < 300ull * 1000 * 1000 && c.send(piece)) sent += piece.size();
    return {sent, c.receive(3000)};
}

}  // namespace

TEST_CASE("behind the shipped nginx, slow and idle clients do not slow a normal client, and huge requests cost no memory") {
    if (!have_program("nginx") || !have_program("openssl")) {
        std::cerr << "NOTICE: nginx or openssl not found: skipping the exposed-deployment test "
                     "(scripts/setup.sh installs them; CI has them)\n";
        return;
    }
    const auto started = Clock::now();
    rlimit files{};
    getrlimit(RLIMIT_NOFILE, &files);
    files.rlim_cur = std::min<rlim_t>(files.rlim_max, 8192);
    setrlimit(RLIMIT_NOFILE, &files);
    REQUIRE(files.rlim_cur >= 2000);

    const fs::path dir = scratch_dir("server_exposed");
    // A certificate for 127.0.0.1, made here; the client trusts exactly it.
    const std::string make_cert =
        "openssl req -x509 -newkey ec -pkeyopt ec_paramgen_curve:prime256v1 -nodes -days 1 -subj /CN=127.0.0.1 "
        "-addext subjectAltName=IP:127.0.0.1 -keyout " + quoted(dir / "key.pem") + " -out " + quoted(dir / "cert.pem") +
        " >/dev/null 2>&1";
    REQUIRE(std::system(make_cert.c_str()) == 0);

    // Credence on loopback with an API token (requests through the proxy need one).
    SimulatedPosteriorOptions spec{.users = 400, .items = 4000, .rank = 8, .samples = 32, .chains = 2};
    spec.id_digits = 5;
    write_posterior(simulate_posterior(spec), (dir / "shop.posterior").string());
    std::ofstream(dir / "tokens") << "shop-web read,customers " << kToken << "\n";
    ServerProcess credence(dir, dir / "shop.posterior",
                           "threads = 16\naccess_log = false\napi_tokens_file = \"" + (dir / "tokens").string() + "\"\n");

    std::string site = read_text(source_dir() / "config" / "nginx" / "credence.conf");
    const int port = free_port();
    replace_once(site, "listen 443 ssl;", "listen 127.0.0.1:" + std::to_string(port) + " ssl;");
    replace_once(site, "server 127.0.0.1:8080", "server 127.0.0.1:" + std::to_string(credence.port()));
    replace_once(site, "/etc/ssl/credence/fullchain.pem", (dir / "cert.pem").string());
    replace_once(site, "/etc/ssl/credence/privkey.pem", (dir / "key.pem").string());
    Nginx nginx(dir / "nginx", site, port);

    httplib::SSLClient client("127.0.0.1", port);
    client.set_ca_cert_path((dir / "cert.pem").string().c_str());
    client.enable_server_certificate_verification(true);
    client.set_keep_alive(true);
    client.set_read_timeout(10, 0);
    const httplib::Headers bearer = {{"Authorization", "Bearer " + kToken}};
    const std::string top10 = "/v1/users/cust-00007/recommendations?n=10";

    SECTION("TLS with the generated certificate; plain HTTP and tokenless customer requests refused") {
        auto health = client.Get("/v1/health");
        REQUIRE(health);
        CHECK(health->status == 200);
        auto no_token = client.Get(top10.c_str());
        REQUIRE(no_token);
        CHECK(no_token->status == 401);  // came through the proxy: a token is required
        auto with_token = client.Get(top10.c_str(), bearer);
        REQUIRE(with_token);
        CHECK(with_token->status == 200);
        // A client that does not trust the certificate gets no answer.
        httplib::SSLClient stranger("127.0.0.1", port);
        stranger.enable_server_certificate_verification(true);
        stranger.set_ca_cert_path("/nonexistent-ca.pem");
        CHECK_FALSE(stranger.Get("/v1/health"));
        // Plain HTTP on the TLS port is refused by nginx.
        RawConnection plain(port);
        plain.send("GET /v1/health HTTP/1.1\r\nHost: x\r\n\r\n");
        CHECK(status_of(plain.receive(3000)) == 400);
    }

    SECTION("200 trickling and 1,000 idle connections leave a normal client's p99 under 100 ms") {
        // Warm up, then the attackers.
        for (int k = 0; k < 20; ++k) REQUIRE(client.Get(top10.c_str(), bearer)->status == 200);
        SSL_CTX* tls = SSL_CTX_new(TLS_client_method());
        SSL_CTX_set_verify(tls, SSL_VERIFY_NONE, nullptr);
        std::vector<std::unique_ptr<RawConnection>> idle;
        for (int k = 0; k < 1000; ++k) idle.push_back(std::make_unique<RawConnection>(port));
        std::vector<std::unique_ptr<TlsConnection>> tricklers;
        for (int k = 0; k < 200; ++k) tricklers.push_back(std::make_unique<TlsConnection>(tls, port));
        std::atomic<bool> stop{false};
        std::atomic<uint64_t> trickled{0};
        std::thread trickle([&] {
            const std::string request = "POST /v1/predictions HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Length: 100000\r\n";
            for (size_t at = 0; !stop; ++at) {
                for (auto& t : tricklers)
                    if (t->send(std::string_view(request).substr(at % request.size(), 1))) ++trickled;
                for (int k = 0; k < 10 && !stop; ++k) std::this_thread::sleep_for(std::chrono::milliseconds(100));
            }
        });
        // The window: 7 s, so that with the set-up it ends inside nginx's
        // 10 s header timeout and every attacker stays connected throughout.
        std::vector<double> health_ms, top_ms;
        size_t failures = 0;
        const auto window_end = Clock::now() + std::chrono::seconds(7);
        while (Clock::now() < window_end) {
            for (const bool is_top : {false, true}) {
                const auto t0 = Clock::now();
                auto r = is_top ? client.Get(top10.c_str(), bearer) : client.Get("/v1/health");
                const double ms = std::chrono::duration<double, std::milli>(Clock::now() - t0).count();
                if (!r || r->status != 200) ++failures;
                (is_top ? top_ms : health_ms).push_back(ms);
            }
            std::this_thread::sleep_for(std::chrono::milliseconds(20));
        }
        size_t idle_open = 0;
        for (auto& c : idle) {
            pollfd p{c->fd(), POLLIN, 0};
            idle_open += ::poll(&p, 1, 0) == 0;  // nothing to read: still open, not closed by the server
        }
        stop = true;
        trickle.join();
        const double p99_health = percentile(health_ms, 0.99), p99_top = percentile(top_ms, 0.99);
        std::cerr << "exposed: " << health_ms.size() << " health and " << top_ms.size()
                  << " top-10 requests under 200 trickling + 1000 idle connections; p99 health " << p99_health
                  << " ms, p99 top-10 " << p99_top << " ms, p50 top-10 " << percentile(top_ms, 0.5) << " ms; "
                  << idle_open << " idle still open, " << trickled << " trickled bytes\n";
        CHECK(failures == 0);
        CHECK(health_ms.size() >= 100);
        CHECK(idle_open >= 990);
        CHECK(trickled >= 200 * 6);
        CHECK(p99_health < 100.0);
        CHECK(p99_top < 100.0);
        tricklers.clear();
        SSL_CTX_free(tls);
    }

    SECTION("a 1 GB chunked upload and a 300 MB header line, through nginx and straight to credence") {
        REQUIRE(client.Get("/v1/health")->status == 200);
        std::this_thread::sleep_for(std::chrono::milliseconds(200));
        const uint64_t credence_idle = rss_kib(credence.pid());
        uint64_t nginx_idle = 0;
        for (pid_t w : children_of(nginx.pid())) nginx_idle = std::max(nginx_idle, rss_kib(w));
        REQUIRE(credence_idle > 0);
        REQUIRE(nginx_idle > 0);
        RssWatch watch(credence.pid(), nginx.pid());
        const std::string upload_head = "POST /v1/predictions HTTP/1.1\r\nHost: 127.0.0.1\r\nAuthorization: Bearer " +
                                        kToken + "\r\nContent-Type: application/json\r\nTransfer-Encoding: chunked\r\n\r\n";
        SSL_CTX* tls = SSL_CTX_new(TLS_client_method());
        SSL_CTX_set_verify(tls, SSL_VERIFY_NONE, nullptr);
        {
            TlsConnection c(tls, port);
            const auto [sent, answer] = huge_chunked_upload(c, upload_head);
            std::cerr << "exposed: chunked upload through nginx stopped after " << sent << " bytes: "
                      << answer.substr(0, answer.find('\r')) << "\n";
            CHECK(status_of(answer) == 413);
        }
        {
            TlsConnection c(tls, port);
            const auto [sent, answer] = huge_header_line(c);
            std::cerr << "exposed: header line through nginx stopped after " << sent << " bytes: "
                      << answer.substr(0, answer.find('\r')) << "\n";
            CHECK(status_of(answer) == 400);
        }
        {
            RawConnection c(credence.port());
            const auto [sent, answer] = huge_chunked_upload(c, upload_head);
            std::cerr << "exposed: chunked upload straight to credence stopped after " << sent << " bytes: "
                      << answer.substr(0, answer.find('\r')) << "\n";
            CHECK(status_of(answer) == 413);
        }
        {
            RawConnection c(credence.port());
            const auto [sent, answer] = huge_header_line(c);
            std::cerr << "exposed: header line straight to credence stopped after " << sent << " bytes: "
                      << answer.substr(0, answer.find('\r')) << "\n";
            CHECK(status_of(answer) == 431);
        }
        SSL_CTX_free(tls);
        watch.finish();
        std::cerr << "exposed: RSS credence idle " << credence_idle << " KiB, peak " << watch.credence_max()
                  << " KiB; nginx worker idle " << nginx_idle << " KiB, peak " << watch.nginx_max() << " KiB\n";
        CHECK(watch.credence_max() < 2 * credence_idle);
        CHECK(watch.nginx_max() < 2 * nginx_idle);
        CHECK(client.Get("/v1/health")->status == 200);
    }
    std::cerr << "exposed: section took "
              << std::chrono::duration<double>(Clock::now() - started).count() << " s\n";
}
