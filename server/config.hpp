// The server's options: defaults, the [serve] table of the TOML config file
// (config/credence.toml documents every key), validation and the admin token.
// Used by `credence serve` (cli/serve_command.cpp) and the server itself.
// serve_config_keys() is the one list of [serve] keys: reading, the check for
// unknown keys, validation and every message about a key come from it.
#pragma once
#include <cstdint>
#include <functional>
#include <span>
#include <string>
#include <string_view>
#include <variant>

namespace credence::server {

struct ServeOptions {
    std::string model_path;                      // posterior file to serve (required)
    std::string host = "127.0.0.1";              // loopback unless told otherwise
    uint16_t port = 8080;                        // 0 binds an ephemeral port (reported on stdout)
    uint32_t threads = 0;                        // worker threads (one per open connection); 0 = max(16, 4 x hardware threads)
    uint64_t body_limit_bytes = 8u << 20;        // larger request bodies get 413 (Content-Length or chunked)
    uint32_t read_timeout_ms = 5000;             // longest pause between a request's bytes
    uint32_t write_timeout_ms = 5000;
    uint32_t request_deadline_ms = 10000;        // a request's head and body must arrive within this
    uint32_t keep_alive_timeout_ms = 5000;       // an idle connection is closed after this
    uint32_t keep_alive_max_requests = 100;      // requests per connection
    uint32_t connection_limit = 256;             // open connections; the next gets 503 at once
    uint32_t listen_backlog = 1024;              // connections the kernel queues before accept
    uint64_t header_line_limit_bytes = 8192;     // request line or header line (431/414 beyond)
    uint32_t header_count_limit = 100;           // header lines per request (431 beyond)
    std::string read_auth = "auto";              // auto | required | off: API tokens for the read routes
    std::string api_tokens_file;                 // named API tokens with their permissions (server/access.hpp)
    std::string metrics_access = "token";        // token | open: who may read /metrics
    std::string admin_token_file;                // file holding the bearer token for /v1/admin/*
    std::string admin_token_env = "CREDENCE_ADMIN_TOKEN";  // env var consulted when no file is set
    std::string model_dir;                       // reload may name files only inside this directory
    bool log_ids = false;                        // access log includes user/item ids
    bool access_log = true;                      // one log line per request
    bool log_json = false;                       // log lines as JSON objects (server/logging.hpp)
    uint32_t max_n = 1000;                       // largest n for top-N and item lists
    uint32_t max_batch = 10000;                  // largest prediction batch / fold-in rating count
    uint32_t topn_lanes = 1;                     // top-N passes running at once; 0 = one per hardware thread
    uint32_t topn_batch_max = 16;                // most top-N requests sharing one pass over the item samples
    uint32_t topn_window_us = 2000;              // longest wait of a pass for top-N requests being parsed or answered
};

// One [serve] key: its name in the file, the ServeOptions field it sets (the
// field's type is the key's type: string, true/false or integer), the range
// an integer must lie in, and one line saying what it sets.
struct ServeConfigKey {
    using Field = std::variant<std::string ServeOptions::*, bool ServeOptions::*, uint16_t ServeOptions::*,
                               uint32_t ServeOptions::*, uint64_t ServeOptions::*>;
    std::string_view name;
    Field field;
    uint64_t min = 0;             // integers only: accepted values are [min, max]
    uint64_t max = 0;
    std::string_view doc;
    std::string_view if_empty;    // strings only: when set, an empty value is refused with this advice
    std::string_view choices;     // strings only: when set, the allowed values separated by '|'
};

// Every [serve] key, in the order config/credence.toml documents them. The
// table is static; the span stays valid for the life of the program.
std::span<const ServeConfigKey> serve_config_keys();

// The key called `name`; throws std::out_of_range for a name not in the table
// (a programming error: callers name keys they know).
const ServeConfigKey& serve_config_key(std::string_view name);

// The key's value in `options` as the config file would spell it: a string
// unquoted, true/false, or decimal digits.
std::string serve_config_value(const ServeConfigKey& key, const ServeOptions& options);

// Reads the [serve] table of a TOML file over `base` (keys absent from the
// file keep base's values). Throws FileError if the file cannot be opened,
// OptionError naming the file and key for a TOML syntax error, an unknown
// key, a wrong type or an out-of-range value.
ServeOptions load_serve_config(const std::string& toml_path, ServeOptions base = {});

// Checks every key's value against the table, whether it came from the file,
// a flag or the defaults: integers within their range, required strings
// (model, host) not empty, strings with choices one of them. Throws OptionError naming the key, its range and
// what it sets.
void validate_serve_options(const ServeOptions& options);

// ---- the environment: every [serve] key also comes from a variable
// CREDENCE_SERVE_<KEY> (the name in upper case: CREDENCE_SERVE_PORT,
// CREDENCE_SERVE_LOG_JSON), for containers and service managers. Precedence:
// built-in defaults, then the config file, then the environment, then flags.

// The variable that sets `key`: "CREDENCE_SERVE_" + the name in upper case.
std::string serve_environment_variable(const ServeConfigKey& key);

// Returns `base` with every key whose variable `lookup` knows (a non-null
// result) set from it: a string as it is, true or false, or decimal digits
// within the key's range. `lookup` is std::getenv unless a test passes its
// own. Throws OptionError naming the variable, what it sets and its range for
// a value of the wrong kind or out of range.
using EnvironmentLookup = std::function<const char*(const char*)>;
ServeOptions apply_serve_environment(ServeOptions base, const EnvironmentLookup& lookup);
ServeOptions apply_serve_environment(ServeOptions base);

// Resolves the admin token: the file's first line (trimmed) when
// admin_token_file is set, else the environment variable admin_token_env.
// Empty when neither is set (admin routes then answer 403). Throws FileError
// if the file is set but unreadable, OptionError if the token is empty.
std::string resolve_admin_token(const ServeOptions& options);

}  // namespace credence::server
