// The HTTP recommendation service: its entry point.
//
// `credence serve` fills a ServeOptions (server/config.hpp: config file first,
// then flags) and calls run_server(), which binds, loads the model off the
// request path, answers until SIGINT/SIGTERM and reloads the model on SIGHUP.
#pragma once
#include "server/config.hpp"

namespace credence::server {

// Serves until SIGINT or SIGTERM, then stops gracefully: the listening
// socket closes at once (new connections are refused), every request being
// answered is finished, idle keep-alive connections are closed, and only then
// does it return. Prints "listening on http://HOST:PORT" on
// stdout (flushed) once bound, with the real port when options.port == 0.
// Returns a process exit code (cli/main.cpp): 0 after a clean stop, 1 if
// binding, the admin token file or the first model load failed, 2 for an
// option value that cannot work (the reason goes to the log on stderr).
int run_server(const ServeOptions& options);

}  // namespace credence::server
