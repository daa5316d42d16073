// A throwaway PostgreSQL server for tests of the database source
// (tests/model/data/test_postgresql_source.cpp and the CLI tests): Debian's
// initdb and pg_ctl build a cluster in a fresh temporary directory, the
// server listens on a free loopback port and on a unix socket in that
// directory, and the destructor stops it (immediate mode) and removes the
// directory. Every step is bounded in time (pg_ctl -t).
#pragma once
#include <arpa/inet.h>
#include <netinet/in.h>
#include <pwd.h>
#include <sys/socket.h>
#include <sys/wait.h>
#include <unistd.h>

#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <iterator>
#include <memory>
#include <optional>
#include <stdexcept>
#include <string>

#include <libpq-fe.h>

namespace credence::testing {

// The bin directory of an installed PostgreSQL server (the newest under
// /usr/lib/postgresql holding initdb, pg_ctl and postgres), or nullopt with
// a visible NOTICE on stderr. Root cannot run a server: as root the
// cluster belongs to the "postgres" account, and its absence is a NOTICE too.
inline std::optional<std::filesystem::path> postgresql_bin_dir() {
    namespace fs = std::filesystem;
    std::optional<fs::path> best;
    std::error_code ec;
    if (fs::is_directory("/usr/lib/postgresql", ec))
        for (const auto& entry : fs::directory_iterator("/usr/lib/postgresql", ec)) {
            const fs::path bin = entry.path() / "bin";
            if (fs::exists(bin / "initdb") && fs::exists(bin / "pg_ctl") && fs::exists(bin / "postgres") &&
                (!best || bin > *best))
                best = bin;
        }
    if (!best) {
        std::cerr << "NOTICE: PostgreSQL server binaries (initdb, pg_ctl) not found under /usr/lib/postgresql; "
                     "skipping the PostgreSQL source checks (scripts/setup.sh installs postgresql)\n";
        return std::nullopt;
    }
    if (::geteuid() == 0 && !::getpwnam("postgres")) {
        std::cerr << "NOTICE: running as root without a postgres account to run the server as; skipping the "
                     "PostgreSQL source checks\n";
        return std::nullopt;
    }
    return best;
}

class PostgresqlServer {
public:
    // The role the cluster is made for, and its password (asked for over
    // TCP; the unix socket trusts local connections).
    static constexpr const char* kUser = "thimbleford";
    static constexpr const char* kPassword = "spool-of-red-thread";

    // Starts a server from `bin` (postgresql_bin_dir()). Throws
    // std::runtime_error, with the server log's tail, when initdb or the
    // start fails (three tries, each on a fresh free port).
    explicit PostgresqlServer(const std::filesystem::path& bin) : bin_(bin) {
        char pattern[] = "/tmp/credence-pg-XXXXXX";
        if (!::mkdtemp(pattern)) throw std::runtime_error("mkdtemp failed");
        dir_ = pattern;
        const struct passwd* owner = ::geteuid() == 0 ? ::getpwnam("postgres") : nullptr;
        if (owner) as_ = "runuser -u postgres -- ";
        std::ofstream(dir_ / "pwfile") << kPassword << "\n";
        if (owner) {
            chown_all(owner);
        }
        run_or_throw(bin_ / "initdb", "-D " + q(dir_ / "data") + " -U " + kUser + " --pwfile=" + q(dir_ / "pwfile") +
                                          " --auth-local=trust --auth-host=scram-sha-256 -E UTF8 --no-sync",
                     "initdb");
        for (int attempt = 0; attempt < 3 && port_ == 0; ++attempt) {
            const int port = free_port();
            const std::string settings = "-c listen_addresses=127.0.0.1 -c port=" + std::to_string(port) +
                                         " -c unix_socket_directories=" + dir_.string() +
                                         " -c fsync=off -c full_page_writes=off";
            if (run(bin_ / "pg_ctl", "start -w -t 60 -D " + q(dir_ / "data") + " -l " + q(dir_ / "server.log") +
                                         " -o " + q(settings)) == 0)
                port_ = port;
        }
        if (port_ == 0) {
            const std::string log = tail(dir_ / "server.log");
            cleanup();
            throw std::runtime_error("the test PostgreSQL server did not start:\n" + log);
        }
    }

    ~PostgresqlServer() {
        if (port_ != 0) run(bin_ / "pg_ctl", "stop -m immediate -w -t 30 -D " + q(dir_ / "data"));
        cleanup();
    }

    PostgresqlServer(const PostgresqlServer&) = delete;
    PostgresqlServer& operator=(const PostgresqlServer&) = delete;

    int port() const { return port_; }
    const std::filesystem::path& socket_dir() const { return dir_; }

    // The URI Credence is given: TCP on loopback, no password in it.
    std::string uri(const std::string& database) const {
        return "postgresql://" + std::string(kUser) + "@127.0.0.1:" + std::to_string(port_) + "/" + database;
    }

    // Runs `sql` over the unix socket (trusted, no password); throws
    // std::runtime_error with the server's message on failure.
    void execute(const std::string& database, const std::string& sql) const {
        const std::string conninfo = "host=" + dir_.string() + " port=" + std::to_string(port_) + " user=" + kUser +
                                     " dbname=" + database + " connect_timeout=10";
        std::unique_ptr<PGconn, void (*)(PGconn*)> conn(PQconnectdb(conninfo.c_str()), &PQfinish);
        if (PQstatus(conn.get()) != CONNECTION_OK)
            throw std::runtime_error(std::string("cannot connect to the test server: ") + PQerrorMessage(conn.get()));
        std::unique_ptr<PGresult, void (*)(PGresult*)> r(PQexec(conn.get(), sql.c_str()), &PQclear);
        const auto status = PQresultStatus(r.get());
        if (status != PGRES_COMMAND_OK && status != PGRES_TUPLES_OK)
            throw std::runtime_error(std::string("test SQL failed: ") + PQresultErrorMessage(r.get()));
    }

private:
    static std::string q(const std::filesystem::path& p) { return "'" + p.string() + "'"; }
    static std::string q(const std::string& s) { return "'" + s + "'"; }

    // A port the kernel hands out for loopback now (another process may take
    // it before the server binds; the caller retries).
    static int free_port() {
        const int fd = ::socket(AF_INET, SOCK_STREAM, 0);
        sockaddr_in addr{};
        addr.sin_family = AF_INET;
        addr.sin_addr.s_addr = htonl(INADDR_LOOPBACK);
        socklen_t len = sizeof addr;
        int port = 0;
        if (fd >= 0 && ::bind(fd, reinterpret_cast<sockaddr*>(&addr), sizeof addr) == 0 &&
            ::getsockname(fd, reinterpret_cast<sockaddr*>(&addr), &len) == 0)
            port = ntohs(addr.sin_port);
        if (fd >= 0) ::close(fd);
        return port;
    }

    static std::string tail(const std::filesystem::path& path) {
        std::ifstream in(path);
        std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
        return text.size() > 2000 ? text.substr(text.size() - 2000) : text;
    }

    void chown_all(const struct passwd* owner) const {
        for (const auto& p : {dir_, dir_ / "pwfile"})
            if (::chown(p.c_str(), owner->pw_uid, owner->pw_gid) != 0)
                throw std::runtime_error("cannot hand " + p.string() + " to the postgres account");
    }

    // The program's exit code; its output goes to <dir>/commands.log.
    int run(const std::filesystem::path& program, const std::string& args) const {
        const std::string command = as_ + q(program) + " " + args + " >>" + q(dir_ / "commands.log") + " 2>&1";
        const int status = std::system(command.c_str());
        return WIFEXITED(status) ? WEXITSTATUS(status) : -1;
    }

    void run_or_throw(const std::filesystem::path& program, const std::string& args, const std::string& what) {
        if (run(program, args) == 0) return;
        const std::string log = tail(dir_ / "commands.log");
        cleanup();
        throw std::runtime_error(what + " failed:\n" + log);
    }

    void cleanup() {
        std::error_code ec;
        std::filesystem::remove_all(dir_, ec);
    }

    std::filesystem::path bin_, dir_;
    std::string as_;  // "runuser -u postgres -- " when root
    int port_ = 0;
};

}  // namespace credence::testing
