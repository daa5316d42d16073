#include "server/config.hpp"

#include <algorithm>
#include <array>
#include <cctype>
#include <charconv>
#include <cstdlib>
#include <fstream>
#include <limits>
#include <stdexcept>
#include <type_traits>
#include <utility>

#include <fmt/format.h>
#include <toml++/toml.h>

#include "model/error.hpp"

namespace credence::server {

namespace {

constexpr uint64_t kU16 = std::numeric_limits<uint16_t>::max();
constexpr uint64_t kU32 = std::numeric_limits<uint32_t>::max();
// TOML integers are signed 64-bit, so no file can say more than this.
constexpr uint64_t kTomlMax = static_cast<uint64_t>(std::numeric_limits<int64_t>::max());

using O = ServeOptions;

// Table rows by kind (every member spelled out: GCC warns on designated
// initializers that leave members to their defaults).
ServeConfigKey text_key(std::string_view name, std::string O::*field, std::string_view doc,
                        std::string_view if_empty = {}) {
    return ServeConfigKey{name, field, 0, 0, doc, if_empty, {}};
}
ServeConfigKey choice_key(std::string_view name, std::string O::*field, std::string_view choices,
                          std::string_view doc) {
    return ServeConfigKey{name, field, 0, 0, doc, {}, choices};
}
ServeConfigKey switch_key(std::string_view name, bool O::*field, std::string_view doc) {
    return ServeConfigKey{name, field, 0, 0, doc, {}, {}};
}
template <typename T>
ServeConfigKey number_key(std::string_view name, T O::*field, uint64_t min, uint64_t max, std::string_view doc) {
    return ServeConfigKey{name, field, min, max, doc, {}, {}};
}

// The one table of [serve] keys (order as in config/credence.toml). Its size
// comes from the list, so no entry is ever left default-constructed.
const auto kKeys = std::to_array<ServeConfigKey>({
    text_key("model", &O::model_path, "posterior file to serve (written by credence fit)",
             "pass --model FILE or set [serve] model"),
    text_key("host", &O::host, "address to bind; loopback unless told otherwise", "use 127.0.0.1 for loopback"),
    number_key("port", &O::port, 0, kU16, "TCP port to bind; 0 picks a free port"),
    number_key("threads", &O::threads, 0, kU32,
               "worker threads, one per open connection; 0: max(16, 4 x hardware threads)"),
    number_key("body_limit_bytes", &O::body_limit_bytes, 1, kTomlMax,
               "largest accepted request body in bytes, sized or chunked; larger bodies get 413"),
    number_key("read_timeout_ms", &O::read_timeout_ms, 1, kU32,
               "longest pause between the bytes of a request, in ms; longer gets 408"),
    number_key("write_timeout_ms", &O::write_timeout_ms, 1, kU32,
               "how long to wait for a client to accept a response, in ms"),
    number_key("request_deadline_ms", &O::request_deadline_ms, 1, kU32,
               "time from a request's first byte to its last (head and body), in ms; longer gets 408"),
    number_key("keep_alive_timeout_ms", &O::keep_alive_timeout_ms, 1, kU32,
               "how long an idle connection may wait for its next request, in ms"),
    number_key("keep_alive_max_requests", &O::keep_alive_max_requests, 1, kU32,
               "requests answered on one connection before it is closed"),
    number_key("connection_limit", &O::connection_limit, 1, 1u << 20,
               "connections open at once (answered or waiting for a worker); the next gets 503 at once"),
    number_key("listen_backlog", &O::listen_backlog, 1, 65535,
               "connections the kernel queues before the server accepts them"),
    number_key("header_line_limit_bytes", &O::header_line_limit_bytes, 256, 1u << 20,
               "longest request line or header line in bytes; longer gets 414 or 431"),
    number_key("header_count_limit", &O::header_count_limit, 1, 10000,
               "most header lines in one request; more gets 431"),
    text_key("admin_token_file", &O::admin_token_file,
             "file holding the bearer token for /v1/admin/*; empty: the variable admin_token_env names"),
    text_key("admin_token_env", &O::admin_token_env, "environment variable holding the admin token when no file is set"),
    choice_key("read_auth", &O::read_auth, "auto|required|off",
               "API tokens for the read routes: auto (required off loopback or through a proxy), required, off"),
    text_key("api_tokens_file", &O::api_tokens_file,
             "file of named API tokens, one 'name permissions token' per line; empty: none"),
    choice_key("metrics_access", &O::metrics_access, "token|open",
               "who may read /metrics: token (a token with the metrics permission, when tokens apply) or open"),
    text_key("model_dir", &O::model_dir,
             "directory that admin reloads may load files from; empty: only the file being served"),
    switch_key("access_log", &O::access_log, "one access-log line per request on stderr"),
    switch_key("log_ids", &O::log_ids, "access-log lines include the request target, so user and item ids"),
    switch_key("log_json", &O::log_json, "every log line is one JSON object (time, level, logger, fields); else text"),
    number_key("max_n", &O::max_n, 1, kU32, "largest n for top-N lists, similar items and item lists"),
    number_key("max_batch", &O::max_batch, 1, kU32, "largest prediction batch, fold-in rating list and candidate list"),
    number_key("topn_lanes", &O::topn_lanes, 0, kU32,
               "top-N passes over the item samples running at once; 0: one per hardware thread"),
    number_key("topn_batch_max", &O::topn_batch_max, 1, kU32, "most top-N requests one pass over the item samples serves"),
    number_key("topn_window_us", &O::topn_window_us, 0, kU32,
               "longest a top-N pass waits, in microseconds, for requests already being parsed or answered to "
               "join it; 0: never wait"),
});

bool is_choice(std::string_view choices, std::string_view value) {
    size_t start = 0;
    while (start <= choices.size()) {
        const size_t bar = std::min(choices.find('|', start), choices.size());
        if (choices.substr(start, bar - start) == value) return true;
        start = bar + 1;
    }
    return false;
}

std::string choice_list(std::string_view choices) {
    std::string out(choices);
    for (size_t at = out.find('|'); at != std::string::npos; at = out.find('|', at)) out.replace(at, 1, ", ");
    return out;
}

std::string range_text(const ServeConfigKey& key) {
    return fmt::format("[{}, {}]", key.min, key.max);
}

// Sets `key` in `options` from a TOML node; returns why it cannot (empty: done).
std::string assign(const ServeConfigKey& key, const toml::node& node, ServeOptions& options) {
    return std::visit(
        [&](auto member) -> std::string {
            using T = std::remove_cvref_t<decltype(options.*member)>;
            if constexpr (std::is_same_v<T, std::string>) {
                if (!node.is_string()) return "must be a string";
                options.*member = node.as_string()->get();
            } else if constexpr (std::is_same_v<T, bool>) {
                if (!node.is_boolean()) return "must be true or false";
                options.*member = node.as_boolean()->get();
            } else {
                if (!node.is_integer()) return "must be an integer in " + range_text(key);
                const int64_t v = node.as_integer()->get();
                if (v < 0 || static_cast<uint64_t>(v) < key.min || static_cast<uint64_t>(v) > key.max)
                    return "is " + std::to_string(v) + ", outside " + range_text(key);
                options.*member = static_cast<T>(v);
            }
            return {};
        },
        key.field);
}

// Why the value of `key` in `options` cannot work (empty: it can).
std::string check(const ServeConfigKey& key, const ServeOptions& options) {
    return std::visit(
        [&](auto member) -> std::string {
            using T = std::remove_cvref_t<decltype(options.*member)>;
            const T& value = options.*member;
            if constexpr (std::is_same_v<T, std::string>) {
                if (value.empty() && !key.if_empty.empty()) return "is empty; " + std::string(key.if_empty);
                if (!key.choices.empty() && !is_choice(key.choices, value))
                    return "is '" + value + "'; use one of " + choice_list(key.choices);
            } else if constexpr (!std::is_same_v<T, bool>) {
                if (value < key.min || value > key.max)
                    return "is " + std::to_string(value) + ", outside " + range_text(key);
            }
            return {};
        },
        key.field);
}

std::string known_names() {
    std::string names;
    for (const auto& key : kKeys) {
        if (!names.empty()) names.append(", ");
        names.append(key.name);
    }
    return names;
}

}  // namespace

std::span<const ServeConfigKey> serve_config_keys() { return kKeys; }

const ServeConfigKey& serve_config_key(std::string_view name) {
    for (const auto& key : kKeys)
        if (key.name == name) return key;
    throw std::out_of_range("serve_config_key: no [serve] key named " + std::string(name));
}

std::string serve_config_value(const ServeConfigKey& key, const ServeOptions& options) {
    return std::visit(
        [&](auto member) -> std::string {
            const auto& value = options.*member;
            using T = std::remove_cvref_t<decltype(value)>;
            if constexpr (std::is_same_v<T, std::string>) return value;
            else if constexpr (std::is_same_v<T, bool>) return value ? "true" : "false";
            else return std::to_string(value);
        },
        key.field);
}

ServeOptions load_serve_config(const std::string& toml_path, ServeOptions base) {
    // A file that cannot be read is a file problem, not a mistake in it.
    if (!std::ifstream(toml_path))
        throw FileError("cannot read config file " + toml_path + "; check the path and its permissions");
    toml::table root;
    try {
        root = toml::parse_file(toml_path);
    } catch (const toml::parse_error& e) {
        throw OptionError("config " + toml_path + ": " + std::string(e.description()) + " at line " +
                    std::to_string(e.source().begin.line));
    }
    const auto* serve_node = root.get("serve");
    if (!serve_node) return base;  // the file may configure other commands only
    const auto* t = serve_node->as_table();
    if (!t) throw OptionError("config " + toml_path + ": serve must be a table ([serve])");

    for (const auto& [name, node] : *t) {
        const std::string_view key_name = name.str();  // a named copy: clang 14 cannot capture a structured binding
        const auto* key = std::find_if(kKeys.begin(), kKeys.end(), [&](const auto& k) { return k.name == key_name; });
        if (key == kKeys.end())
            throw OptionError("config " + toml_path + ": [serve] " + std::string(name.str()) +
                        " is not a known option; the options are " + known_names() +
                        " (config/credence.toml documents each)");
        if (const std::string why = assign(*key, node, base); !why.empty())
            throw OptionError("config " + toml_path + ": [serve] " + std::string(key->name) + " " + why + " (" +
                        std::string(key->doc) + ")");
    }
    return base;
}

void validate_serve_options(const ServeOptions& o) {
    for (const auto& key : kKeys)
        if (const std::string why = check(key, o); !why.empty())
            throw OptionError("serve: " + std::string(key.name) + " " + why + " (" + std::string(key.doc) + ")");
}

std::string resolve_admin_token(const ServeOptions& o) {
    std::string token;
    if (!o.admin_token_file.empty()) {
        std::ifstream in(o.admin_token_file);
        if (!in) throw FileError("serve: cannot read admin token file " + o.admin_token_file);
        std::getline(in, token);
    } else if (!o.admin_token_env.empty()) {
        if (const char* env = std::getenv(o.admin_token_env.c_str())) token = env;
        else return {};
    } else {
        return {};
    }
    const auto first = token.find_first_not_of(" \t\r\n");
    const auto last = token.find_last_not_of(" \t\r\n");
    token = first == std::string::npos ? std::string() : token.substr(first, last - first + 1);
    if (token.empty())
        throw OptionError("serve: the admin token " +
                    (o.admin_token_file.empty() ? "variable " + o.admin_token_env : "file " + o.admin_token_file) +
                    " is empty; put a long random string in it or unset it");
    return token;
}

// ---- the environment (CREDENCE_SERVE_<KEY>)

std::string serve_environment_variable(const ServeConfigKey& key) {
    std::string name = "CREDENCE_SERVE_";
    for (const char c : key.name) name.push_back(static_cast<char>(std::toupper(static_cast<unsigned char>(c))));
    return name;
}

namespace {

// Sets `key` from the text of its variable; returns why it cannot (empty: done).
std::string assign_text(const ServeConfigKey& key, const std::string& text, ServeOptions& options) {
    return std::visit(
        [&](auto member) -> std::string {
            using T = std::remove_cvref_t<decltype(options.*member)>;
            if constexpr (std::is_same_v<T, std::string>) {
                return assign(key, toml::value<std::string>(text), options);
            } else if constexpr (std::is_same_v<T, bool>) {
                if (text != "true" && text != "false") return "must be true or false";
                return assign(key, toml::value<bool>(text == "true"), options);
            } else {
                int64_t v = 0;
                const auto [end, ec] = std::from_chars(text.data(), text.data() + text.size(), v);
                if (text.empty() || ec != std::errc() || end != text.data() + text.size())
                    return "must be an integer in " + range_text(key);
                return assign(key, toml::value<int64_t>(v), options);
            }
        },
        key.field);
}

}  // namespace

ServeOptions apply_serve_environment(ServeOptions base, const EnvironmentLookup& lookup) {
    for (const auto& key : kKeys) {
        const std::string variable = serve_environment_variable(key);
        const char* value = lookup(variable.c_str());
        if (!value) continue;
        if (const std::string why = assign_text(key, value, base); !why.empty())
            throw OptionError("environment: " + variable + "=" + value + " " + why + " (sets [serve] " +
                              std::string(key.name) + ": " + std::string(key.doc) + ")");
    }
    return base;
}

ServeOptions apply_serve_environment(ServeOptions base) {
    return apply_serve_environment(std::move(base), [](const char* name) -> const char* { return std::getenv(name); });
}

}  // namespace credence::server
