// Service metrics in the Prometheus text exposition format (version 0.0.4):
// requests by route pattern and status, a latency histogram by route,
// requests in flight, open and refused connections, and the loaded model's
// load time and fingerprint.
#pragma once
#include <atomic>
#include <cstdint>
#include <functional>
#include <map>
#include <mutex>
#include <string>
#include <utility>
#include <vector>

namespace credence::server {

struct LoadedModel;

class Metrics {
public:
    // Upper bounds of the latency histogram buckets, in seconds (+Inf implied).
    static const std::vector<double>& latency_buckets_s();

    void request_started() { in_flight_.fetch_add(1, std::memory_order_relaxed); }
    // `route` is the route pattern (never a raw path, so label sets stay bounded).
    void request_finished(const std::string& route, int status, double latency_s);
    void reload_finished(bool ok);
    // A connection over the connection limit got 503 and was closed.
    void connection_refused() { connections_refused_.fetch_add(1, std::memory_order_relaxed); }
    // Where the open-connections gauge reads (the listener's count of
    // connections queued or in work, this scrape's own included). Call once,
    // before the server starts; until then the gauge is not rendered. The
    // function must stay callable while render() can run.
    void watch_open_connections(std::function<uint32_t()> count) { open_connections_ = std::move(count); }

    // The whole exposition; `model` may be null (no model loaded yet).
    std::string render(const LoadedModel* model) const;

private:
    struct RouteLatency {
        std::vector<uint64_t> bucket_counts;  // cumulative is computed at render time
        uint64_t count = 0;
        double sum_s = 0.0;
    };
    mutable std::mutex mutex_;
    std::map<std::pair<std::string, int>, uint64_t> requests_;
    std::map<std::string, RouteLatency> latency_;
    std::atomic<int64_t> in_flight_{0};
    std::atomic<uint64_t> reloads_ok_{0};
    std::atomic<uint64_t> reloads_failed_{0};
    std::atomic<uint64_t> connections_refused_{0};
    std::function<uint32_t()> open_connections_;  // set before serving, read-only after
};

}  // namespace credence::server
