// The server's options: defaults, the [serve] table of the TOML config file
// (config/credence.toml documents every key), validation and the admin token.
// Used by `credence serve` (cli/serve_command.cpp) and the server itself.
#pragma once
#include <cstdint>
#include <string>

namespace credence::server {

struct ServeOptions {
    std::string model_path;                      // posterior file to serve (required)
    std::string host = "127.0.0.1";              // loopback unless told otherwise
    uint16_t port = 8080;                        // 0 binds an ephemeral port (reported on stdout)
    uint32_t threads = 0;                        // worker threads (one per open connection); 0 = max(16, 4 x hardware threads)
    uint64_t body_limit_bytes = 8u << 20;        // larger request bodies get 413
    uint32_t read_timeout_ms = 5000;
    uint32_t write_timeout_ms = 5000;
    std::string admin_token_file;                // file holding the bearer token for /v1/admin/*
    std::string admin_token_env = "CREDENCE_ADMIN_TOKEN";  // env var consulted when no file is set
    std::string model_dir;                       // reload may name files only inside this directory
    bool log_ids = false;                        // access log includes user/item ids
    bool access_log = true;                      // one log line per request
    uint32_t max_n = 1000;                       // largest n for top-N and item lists
    uint32_t max_batch = 10000;                  // largest prediction batch / fold-in rating count
    uint32_t topn_lanes = 0;                     // top-N passes running at once; 0 = one per hardware thread
    uint32_t topn_batch_max = 16;                // most top-N requests sharing one pass over the item samples
};

// Reads the [serve] table of a TOML file over `base` (keys absent from the
// file keep base's values). Throws credence::Error naming the file and key
// for an unknown key, a wrong type or an out-of-range value.
ServeOptions load_serve_config(const std::string& toml_path, ServeOptions base = {});

// Checks option values that no file or flag may break (port range, limits > 0,
// model path set); throws credence::Error with an actionable message.
void validate_serve_options(const ServeOptions& options);

// Resolves the admin token: the file's first line (trimmed) when
// admin_token_file is set, else the environment variable admin_token_env.
// Empty when neither is set (admin routes then answer 403). Throws
// credence::Error if the file is set but unreadable or empty.
std::string resolve_admin_token(const ServeOptions& options);

}  // namespace credence::server
