// The HTTP recommendation service: entry point and options.
//
// `credence serve` fills a ServeOptions (config file first, then flags) and
// calls run_server(), which binds, loads the model off the request path,
// answers until SIGINT/SIGTERM and reloads the model on SIGHUP.
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

// Serves until SIGINT or SIGTERM. Prints "listening on http://HOST:PORT" on
// stdout (flushed) once bound, with the real port when options.port == 0.
// Returns a process exit code: 0 after a clean stop, 1 if binding or the
// first model load failed (the reason goes to the log on stderr).
int run_server(const ServeOptions& options);

}  // namespace credence::server
