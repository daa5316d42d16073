// Tests for server/config: the documented config file parses to the
// documented defaults, values override (file, then CREDENCE_SERVE_<KEY>
// variables, then flags), and mistakes are reported by key or variable.
#include <catch2/catch.hpp>

#include <cctype>
#include <cstdlib>
#include <fstream>
#include <limits>
#include <map>
#include <set>
#include <stdexcept>
#include <string>
#include <type_traits>
#include <variant>

#include <toml++/toml.h>

#include "model/error.hpp"
#include "server/config.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

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
    for (const auto& key : serve_config_keys()) {
        if (key.name == "model") continue;
        INFO(key.name);
        CHECK(serve_config_value(key, loaded) == serve_config_value(key, defaults));
    }
    // Every key is preceded by a comment line.
    std::ifstream in(path);
    std::string line, previous;
    size_t keys = 0;
    while (std::getline(in, line)) {
        if (!line.empty() && line[0] != '#' && line[0] != '[') {
            INFO(line);
            CHECK((previous.rfind("#", 0) == 0 || previous.find(" = ") != std::string::npos));
            ++keys;
        }
        previous = line;
    }
    CHECK(keys == serve_config_keys().size());
}

TEST_CASE("the key table and config/credence.toml name the same keys") {
    const auto path = credence::testing::source_dir() / "config" / "credence.toml";
    const toml::table root = toml::parse_file(path.string());
    const auto* serve = root["serve"].as_table();
    REQUIRE(serve);
    std::set<std::string> documented;
    for (const auto& [name, value] : *serve) documented.insert(std::string(name.str()));
    std::set<std::string> table;
    for (const auto& key : serve_config_keys()) {
        INFO(key.name);
        CHECK(table.insert(std::string(key.name)).second);  // no key twice
        CHECK_FALSE(key.doc.empty());
        CHECK(documented.count(std::string(key.name)) == 1);
    }
    for (const auto& name : documented) {
        INFO(name);
        CHECK(table.count(name) == 1);
    }
    // Each key also works through serve_config_key by its name.
    for (const auto& name : documented) CHECK(serve_config_key(name).name == name);
    CHECK_THROWS_AS(serve_config_key("no_such_key"), std::out_of_range);
}

TEST_CASE("every key refuses a wrong type and an out-of-range value by name, with its range") {
    const auto dir = credence::testing::scratch_dir("server_config_table");
    auto message = [&](const std::string& text) -> std::string {
        try {
            load_serve_config(write_file(dir, "bad.toml", "[serve]\n" + text + "\n").string());
        } catch (const Error& e) {
            return e.what();
        }
        return "accepted";
    };
    size_t integers = 0;
    for (const auto& key : serve_config_keys()) {
        const std::string name(key.name);
        INFO(name);
        const bool text = std::holds_alternative<std::string ServeOptions::*>(key.field);
        const bool boolean = std::holds_alternative<bool ServeOptions::*>(key.field);
        // A wrong type: strings get a number, everything else a string.
        const auto wrong = message(name + (text ? " = 12" : " = \"12\""));
        CHECK(wrong.find("[serve] " + name + " must be") != std::string::npos);
        if (text || boolean) continue;
        ++integers;
        const std::string range = "[" + std::to_string(key.min) + ", " + std::to_string(key.max) + "]";
        // The ends of the range are accepted ...
        for (const uint64_t end : {key.min, key.max}) {
            const auto path = write_file(dir, "ok.toml", "[serve]\n" + name + " = " + std::to_string(end) + "\n");
            CHECK(serve_config_value(key, load_serve_config(path.string())) == std::to_string(end));
        }
        // ... and one step outside is refused with the value and the range in the message.
        auto refused = [&](const std::string& value) {
            INFO(value);
            CHECK(message(name + " = " + value).find(name + " is " + value + ", outside " + range) != std::string::npos);
        };
        refused("-1");
        if (key.min > 0) refused(std::to_string(key.min - 1));
        if (key.max < uint64_t(std::numeric_limits<int64_t>::max())) refused(std::to_string(key.max + 1));
    }
    CHECK(integers > 0);  // the loop above met the integer keys
    // An unknown key names itself and the keys that exist.
    const auto unknown = message("prot = 80");
    CHECK(unknown.find("[serve] prot is not a known option") != std::string::npos);
    CHECK(unknown.find("port") != std::string::npos);
}

TEST_CASE("validation checks values from flags and defaults against the same table") {
    ServeOptions ok;
    ok.model_path = "shop.posterior";
    CHECK_NOTHROW(validate_serve_options(ok));
    // The model is required and its absence says how to give one.
    CHECK_THROWS_WITH(validate_serve_options(ServeOptions{}),
                      Catch::Contains("model is empty") && Catch::Contains("--model"));
    for (const auto& key : serve_config_keys()) {
        INFO(key.name);
        ServeOptions o = ok;
        if (const auto* text = std::get_if<std::string ServeOptions::*>(&key.field)) {
            o.*(*text) = "";
            if (!key.choices.empty())  // a choice key: the empty string is not one of its choices
                CHECK_THROWS_WITH(validate_serve_options(o), Catch::Contains(std::string(key.name) + " is ''"));
            else if (key.if_empty.empty()) CHECK_NOTHROW(validate_serve_options(o));
            else CHECK_THROWS_WITH(validate_serve_options(o), Catch::Contains(std::string(key.name) + " is empty"));
        } else if (key.min > 0) {
            // Every integer with a lower bound above 0: 0 is refused by name.
            std::visit(
                [&](auto member) {
                    if constexpr (!std::is_same_v<decltype(member), std::string ServeOptions::*> &&
                                  !std::is_same_v<decltype(member), bool ServeOptions::*>)
                        o.*member = 0;
                },
                key.field);
            CHECK_THROWS_WITH(validate_serve_options(o),
                              Catch::Contains("serve: " + std::string(key.name) + " is 0, outside"));
        }
    }
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

TEST_CASE("every key can be set from its CREDENCE_SERVE_ variable, over the config file") {
    // A value for each key that differs from what the file below sets.
    std::map<std::string, std::string> env;
    ServeOptions from_file;
    from_file.model_path = "from-file.posterior";
    for (const auto& key : serve_config_keys()) {
        const std::string variable = serve_environment_variable(key);
        INFO(key.name);
        std::string upper;
        for (char c : key.name) upper.push_back(static_cast<char>(std::toupper(static_cast<unsigned char>(c))));
        CHECK(variable == "CREDENCE_SERVE_" + upper);
        std::visit(
            [&](auto member) {
                using T = std::remove_cvref_t<decltype(from_file.*member)>;
                if constexpr (std::is_same_v<T, std::string>) env[variable] = "env-" + std::string(key.name);
                else if constexpr (std::is_same_v<T, bool>) env[variable] = from_file.*member ? "false" : "true";
                else env[variable] = std::to_string(from_file.*member == key.min ? key.max : key.min);
            },
            key.field);
    }
    const auto lookup = [&](const char* name) -> const char* {
        const auto it = env.find(name);
        return it == env.end() ? nullptr : it->second.c_str();
    };
    const ServeOptions applied = apply_serve_environment(from_file, lookup);
    for (const auto& key : serve_config_keys()) {
        INFO(key.name);
        CHECK(serve_config_value(key, applied) == env.at(serve_environment_variable(key)));
        CHECK(serve_config_value(key, applied) != serve_config_value(key, from_file));
    }
    // No variables: the file's values stay.
    const ServeOptions untouched = apply_serve_environment(from_file, [](const char*) -> const char* { return nullptr; });
    for (const auto& key : serve_config_keys()) CHECK(serve_config_value(key, untouched) == serve_config_value(key, from_file));
}

TEST_CASE("a variable of the wrong kind or out of range is refused by name, with what it sets") {
    auto fails_with = [](const std::string& variable, const std::string& value, const std::string& needle) {
        try {
            apply_serve_environment(ServeOptions{}, [&](const char* name) -> const char* {
                return name == variable ? value.c_str() : nullptr;
            });
            FAIL("accepted " << variable << "=" << value);
        } catch (const OptionError& e) {
            INFO(e.what());
            CHECK(std::string(e.what()).find(variable + "=" + value) != std::string::npos);
            CHECK(std::string(e.what()).find(needle) != std::string::npos);
        }
    };
    fails_with("CREDENCE_SERVE_PORT", "70000", "outside [0, 65535]");
    fails_with("CREDENCE_SERVE_PORT", "-1", "outside [0, 65535]");
    fails_with("CREDENCE_SERVE_PORT", "80x", "must be an integer in [0, 65535]");
    fails_with("CREDENCE_SERVE_PORT", "", "must be an integer");
    fails_with("CREDENCE_SERVE_MAX_N", "0", "outside [1, ");
    fails_with("CREDENCE_SERVE_LOG_JSON", "yes", "must be true or false");
    fails_with("CREDENCE_SERVE_ACCESS_LOG", "1", "must be true or false");
}

TEST_CASE("credence serve reads the environment after its config file and before its flags") {
    const auto dir = credence::testing::scratch_dir("server_config_env");
    const auto config = write_file(dir, "serve.toml", "[serve]\nmax_n = 20\n");
    // An impossible value from the environment stops serve before it binds, as
    // a usage error naming the variable: so the program reads it.
    ::setenv("CREDENCE_SERVE_MAX_N", "0", 1);
    const auto refused = credence::testing::run_credence("serve --config " + credence::testing::quoted(config) +
                                                         " --model " + credence::testing::quoted(dir / "none"));
    ::unsetenv("CREDENCE_SERVE_MAX_N");
    INFO(refused.err);
    CHECK(refused.exit_code == 2);
    CHECK(refused.err.find("CREDENCE_SERVE_MAX_N=0") != std::string::npos);
    // A flag wins over the variable: the model named by --model is the one
    // that fails to load (exit 1, a file problem), not the variable's.
    ::setenv("CREDENCE_SERVE_MODEL", (dir / "from-env.posterior").c_str(), 1);
    ::setenv("CREDENCE_SERVE_PORT", "0", 1);
    const auto flag_wins = credence::testing::run_credence("serve --model " +
                                                           credence::testing::quoted(dir / "from-flag.posterior"));
    ::unsetenv("CREDENCE_SERVE_MODEL");
    ::unsetenv("CREDENCE_SERVE_PORT");
    INFO(flag_wins.err);
    CHECK(flag_wins.exit_code == 1);
    CHECK(flag_wins.err.find("from-flag.posterior") != std::string::npos);
    CHECK(flag_wins.err.find("from-env.posterior") == std::string::npos);
}
