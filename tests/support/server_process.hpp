// Runs the real HTTP server in a child process on an ephemeral loopback port
// for tests, and talks to it with httplib::Client.
//
// The child is the built program, `credence serve --config FILE`, so the
// tests exercise exactly what a shop runs; requests cross a real socket.
// The config file written for the child sets port 0; the harness reads the
// "listening on http://127.0.0.1:PORT" line from the child's stdout.
#pragma once
#include <fcntl.h>
#include <poll.h>
#include <signal.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <map>
#include <memory>
#include <sstream>
#include <stdexcept>
#include <string>
#include <thread>

#include <httplib.h>

#include "tests/support/paths.hpp"

namespace credence::testing {

class ServerProcess {
public:
    // `settings`: extra [serve] keys as TOML lines ("max_batch = 50"); the
    // model, host 127.0.0.1 and port 0 are always set, threads = 4 unless
    // the settings name threads. `binary`: the program
    // to run, the built one unless a test runs a copy elsewhere.
    ServerProcess(const std::filesystem::path& dir, const std::filesystem::path& model,
                  const std::string& settings = "", const std::filesystem::path& binary = credence_binary()) {
        config_ = dir / "credence.toml";
        log_ = dir / "server.log";
        {
            std::ofstream cfg(config_);
            cfg << "[serve]\nmodel = \"" << model.string() << "\"\nhost = \"127.0.0.1\"\nport = 0\n"
                << (settings.find("threads =") == std::string::npos ? "threads = 4\n" : "") << settings << "\n";
        }
        int out[2];
        if (pipe(out) != 0) throw std::runtime_error("pipe failed");
        pid_ = fork();
        if (pid_ < 0) throw std::runtime_error("fork failed");
        if (pid_ == 0) {
            dup2(out[1], STDOUT_FILENO);
            const int log_fd = ::open(log_.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
            if (log_fd >= 0) dup2(log_fd, STDERR_FILENO);
            close(out[0]);
            close(out[1]);
            const std::string bin = binary.string(), cfg = config_.string();
            execl(bin.c_str(), bin.c_str(), "serve", "--config", cfg.c_str(), static_cast<char*>(nullptr));
            _exit(127);
        }
        close(out[1]);
        stdout_fd_ = out[0];
        port_ = read_port();
        wait_ready();
    }

    ~ServerProcess() { stop(); }
    ServerProcess(const ServerProcess&) = delete;
    ServerProcess& operator=(const ServerProcess&) = delete;

    int port() const { return port_; }
    pid_t pid() const { return pid_; }
    std::unique_ptr<httplib::Client> client() const {
        auto c = std::make_unique<httplib::Client>("127.0.0.1", port_);
        c->set_read_timeout(30, 0);
        c->set_connection_timeout(5, 0);
        return c;
    }
    void signal(int sig) const { ::kill(pid_, sig); }

    // SIGTERM, then the exit code (or -1 if it had to be killed).
    int stop() {
        if (pid_ <= 0) return exit_code_;
        ::kill(pid_, SIGTERM);
        return wait_for_exit();
    }

    // Waits up to 10 s for the process to end by itself (after a signal the
    // test sent), then kills it. The exit code, or -1 if it was killed or
    // ended by a signal.
    int wait_for_exit() {
        if (pid_ <= 0) return exit_code_;
        int status = 0;
        for (int k = 0; k < 200; ++k) {
            if (waitpid(pid_, &status, WNOHANG) == pid_) {
                exit_code_ = WIFEXITED(status) ? WEXITSTATUS(status) : -1;
                pid_ = 0;
                close(stdout_fd_);
                return exit_code_;
            }
            std::this_thread::sleep_for(std::chrono::milliseconds(50));
        }
        ::kill(pid_, SIGKILL);
        waitpid(pid_, &status, 0);
        pid_ = 0;
        close(stdout_fd_);
        return exit_code_;
    }

    std::string log() const {
        std::ifstream in(log_);
        std::ostringstream s;
        s << in.rdbuf();
        return s.str();
    }

private:
    int read_port() {
        std::string text;
        const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(30);
        while (std::chrono::steady_clock::now() < deadline) {
            pollfd pfd{stdout_fd_, POLLIN, 0};
            if (poll(&pfd, 1, 200) > 0) {
                char buf[256];
                const ssize_t got = ::read(stdout_fd_, buf, sizeof buf);
                if (got <= 0) break;
                text.append(buf, static_cast<size_t>(got));
                const auto at = text.find("listening on http://127.0.0.1:");
                if (at != std::string::npos && text.find('\n', at) != std::string::npos)
                    return std::stoi(text.substr(at + 30));
            }
        }
        throw std::runtime_error("server did not report its port; log:\n" + log());
    }

    void wait_ready() {
        auto c = client();
        const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(60);
        while (std::chrono::steady_clock::now() < deadline) {
            if (auto r = c->Get("/v1/ready"); r && r->status == 200) return;
            std::this_thread::sleep_for(std::chrono::milliseconds(20));
        }
        throw std::runtime_error("server never became ready; log:\n" + log());
    }

    std::filesystem::path config_, log_;
    pid_t pid_ = 0;
    int stdout_fd_ = -1;
    int port_ = 0;
    int exit_code_ = -1;
};

}  // namespace credence::testing
