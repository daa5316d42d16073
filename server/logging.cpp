#include "server/logging.hpp"

#include <atomic>
#include <chrono>
#include <cmath>
#include <ctime>
#include <string>

#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <spdlog/pattern_formatter.h>
#include <spdlog/sinks/stdout_sinks.h>
#include <spdlog/spdlog.h>

namespace credence::server {

namespace {

// Whether the logs are JSON lines; set by use_json_logs(), read per access line.
std::atomic<bool> g_json_logs{false};

std::shared_ptr<spdlog::logger> stderr_logger(const std::string& name) {
    auto existing = spdlog::get(name);
    return existing ? existing : spdlog::stderr_logger_mt(name);
}

std::shared_ptr<spdlog::logger> access_logger() {
    static const auto logger = stderr_logger("credence.access");
    return logger;
}

std::string dump(const nlohmann::ordered_json& value) {
    return value.dump(-1, ' ', false, nlohmann::json::error_handler_t::replace);
}

class JsonLineFormatter final : public spdlog::formatter {
public:
    explicit JsonLineFormatter(bool payload_is_object) : payload_is_object_(payload_is_object) {}

    void format(const spdlog::details::log_msg& msg, spdlog::memory_buf_t& dest) override {
        const auto since_epoch = msg.time.time_since_epoch();
        const std::time_t seconds = std::chrono::duration_cast<std::chrono::seconds>(since_epoch).count();
        const auto millis = std::chrono::duration_cast<std::chrono::milliseconds>(since_epoch).count() % 1000;
        std::tm utc{};
        gmtime_r(&seconds, &utc);
        const auto level = spdlog::level::to_string_view(msg.level);
        nlohmann::ordered_json head = {
            {"time", fmt::format("{:04}-{:02}-{:02}T{:02}:{:02}:{:02}.{:03}Z", utc.tm_year + 1900, utc.tm_mon + 1,
                                 utc.tm_mday, utc.tm_hour, utc.tm_min, utc.tm_sec, millis)},
            {"level", std::string(level.data(), level.size())},
            {"logger", std::string(msg.logger_name.data(), msg.logger_name.size())},
        };
        const std::string_view payload(msg.payload.data(), msg.payload.size());
        std::string line = dump(head);
        if (payload_is_object_ && payload.size() > 2 && payload.front() == '{') {
            line.back() = ',';  // splice the object's fields in after the head's
            line.append(payload.substr(1));
        } else {
            head["message"] = std::string(payload);
            line = dump(head);
        }
        line.push_back('\n');
        dest.append(line.data(), line.data() + line.size());
    }

    std::unique_ptr<spdlog::formatter> clone() const override {
        return std::make_unique<JsonLineFormatter>(payload_is_object_);
    }

private:
    bool payload_is_object_;
};

}  // namespace

spdlog::logger& event_log() {
    static const auto logger = stderr_logger("credence.serve");
    return *logger;
}

std::unique_ptr<spdlog::formatter> json_line_formatter(bool payload_is_object) {
    return std::make_unique<JsonLineFormatter>(payload_is_object);
}

void use_json_logs(bool json) {
    g_json_logs = json;
    if (json) {
        event_log().set_formatter(json_line_formatter(false));
        access_logger()->set_formatter(json_line_formatter(true));
    } else {
        event_log().set_formatter(std::make_unique<spdlog::pattern_formatter>());
        access_logger()->set_formatter(std::make_unique<spdlog::pattern_formatter>());
    }
}

void log_access(std::string_view method, std::string_view route, int status, double latency_ms,
                std::string_view target) {
    if (g_json_logs) {
        nlohmann::ordered_json fields = {
            {"method", method}, {"route", route}, {"status", status},
            {"latency_ms", std::round(latency_ms * 1000.0) / 1000.0}};  // to the microsecond, as in text
        if (!target.empty()) fields["target"] = target;
        const std::string line = dump(fields);
        access_logger()->log(spdlog::level::info, spdlog::string_view_t(line.data(), line.size()));
    } else if (target.empty()) {
        access_logger()->info("{} {} status={} latency_ms={:.3f}", method, route, status, latency_ms);
    } else {
        access_logger()->info("{} {} status={} latency_ms={:.3f} target={}", method, route, status, latency_ms,
                              target);
    }
}

}  // namespace credence::server
