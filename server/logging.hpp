// The service's two logs on stderr, as text or as JSON lines: the event log
// ("credence.serve": start, model loads, errors) and the access log
// ("credence.access": one line per request). Used by server/app.cpp and
// run_server(); the [serve] keys access_log, log_ids and log_json set them.
#pragma once
#include <memory>
#include <string_view>

#include <spdlog/formatter.h>
#include <spdlog/logger.h>

namespace credence::server {

// The event log. Lines carry no customer or product ids (README, Privacy).
spdlog::logger& event_log();

// Switches both logs between text (spdlog's default pattern) and JSON lines.
// Call before serving; safe at any time (spdlog guards each logger).
void use_json_logs(bool json);

// One access-log line: method, route pattern, status and latency, plus the
// request target when `target` is not empty (log_ids: it holds ids). As text
// "GET /v1/ready status=200 latency_ms=0.123"; as JSON the same as fields.
void log_access(std::string_view method, std::string_view route, int status, double latency_ms,
                std::string_view target);

// The JSON line formatter: {"time":"<UTC ISO 8601, ms>","level":"info",
// "logger":"<name>", ...}. With payload_is_object false the message becomes
// "message":"<text>" (escaped; invalid UTF-8 replaced by U+FFFD); with true
// the message must be a JSON object's text and its fields follow (the access
// log writes them so). Owned by the caller; exposed for tests.
std::unique_ptr<spdlog::formatter> json_line_formatter(bool payload_is_object);

}  // namespace credence::server
