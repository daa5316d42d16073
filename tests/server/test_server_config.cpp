// Tests for server/config: the documented config file parses to the
// documented defaults, values override, and mistakes are reported by key.
#include <catch2/catch.hpp>

#include <cstdlib>
#include <fstream>

#include "model/error.hpp"
#include "server/config.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
using namespace credence::server;
namespace fs = std::filesystem;

namespace {
fs::path write_file(const fs::path& dir, const std::string& name, const std::string& text) {
    std::ofstream(dir / name) << text;
    return dir / name;
}
}  // namespace

TEST_CASE("the shipped config documents every option with the built-in defaults") {
    const auto path = credence::testing::source_dir() / "config" / "credence.toml";
    const ServeOptions defaults;
    const ServeOptions loaded = load_serve_config(path.string());
    CHECK(loaded.model_path == "shop.posterior");
    CHECK(loaded.host == defaults.host);
    CHECK(loaded.port == defaults.port);
    CHECK(loaded.threads == defaults.threads);
    CHECK(loaded.body_limit_bytes == defaults.body_limit_bytes);
    CHECK(loaded.read_timeout_ms == defaults.read_timeout_ms);
    CHECK(loaded.write_timeout_ms == defaults.write_timeout_ms);
    CHECK(loaded.admin_token_file == defaults.admin_token_file);
    CHECK(loaded.admin_token_env == defaults.admin_token_env);
    CHECK(loaded.model_dir == defaults.model_dir);
    CHECK(loaded.access_log == defaults.access_log);
    CHECK(loaded.log_ids == defaults.log_ids);
    CHECK(loaded.max_n == defaults.max_n);
    CHECK(loaded.max_batch == defaults.max_batch);
    CHECK(loaded.topn_lanes == defaults.topn_lanes);
    CHECK(loaded.topn_batch_max == defaults.topn_batch_max);
    // Every key is preceded by a comment line.
    std::ifstream in(path);
    std::string line, previous;
    int keys = 0;
    while (std::getline(in, line)) {
        if (!line.empty() && line[0] != '#' && line[0] != '[') {
            INFO(line);
            CHECK((previous.rfind("#", 0) == 0 || previous.find(" = ") != std::string::npos));
            ++keys;
        }
        previous = line;
    }
    CHECK(keys == 16);  // one per ServeOptions field
}

TEST_CASE("config values override defaults; mistakes name the key") {
    const auto dir = credence::testing::scratch_dir("server_config");
    auto ok = load_serve_config(
        write_file(dir, "a.toml", "[serve]\nport = 0\nmax_n = 50\nlog_ids = true\nhost = \"127.0.0.1\"\n").string());
    CHECK(ok.port == 0);
    CHECK(ok.max_n == 50);
    CHECK(ok.log_ids);
    CHECK(ok.max_batch == ServeOptions{}.max_batch);
    // A file without [serve] leaves everything as it was.
    CHECK(load_serve_config(write_file(dir, "b.toml", "[fit]\nrank = 8\n").string()).port == 8080);

    auto fails_with = [&](const std::string& text, const std::string& needle) {
        try {
            load_serve_config(write_file(dir, "bad.toml", text).string());
            FAIL("accepted: " << text);
        } catch (const Error& e) {
            INFO(e.what());
            CHECK(std::string(e.what()).find(needle) != std::string::npos);
        }
    };
    fails_with("[serve]\nprot = 80\n", "prot");
    fails_with("[serve]\nport = 70000\n", "port");
    fails_with("[serve]\nport = \"80\"\n", "port");
    fails_with("[serve]\nmax_n = 0\n", "max_n");
    fails_with("[serve]\nlog_ids = 1\n", "log_ids");
    fails_with("[serve\n", "line 1");
}

TEST_CASE("the admin token comes from a file or the environment, trimmed") {
    const auto dir = credence::testing::scratch_dir("server_token");
    ServeOptions o;
    o.admin_token_env = "CREDENCE_TEST_TOKEN_VAR";
    ::unsetenv("CREDENCE_TEST_TOKEN_VAR");
    CHECK(resolve_admin_token(o).empty());
    ::setenv("CREDENCE_TEST_TOKEN_VAR", "  from-env \n", 1);
    CHECK(resolve_admin_token(o) == "from-env");
    o.admin_token_file = write_file(dir, "token", "from-file\nsecond line ignored\n").string();
    CHECK(resolve_admin_token(o) == "from-file");
    o.admin_token_file = write_file(dir, "empty", "\n").string();
    CHECK_THROWS_AS(resolve_admin_token(o), Error);
    o.admin_token_file = (dir / "missing").string();
    CHECK_THROWS_AS(resolve_admin_token(o), Error);
    ::unsetenv("CREDENCE_TEST_TOKEN_VAR");
}
