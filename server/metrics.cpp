#include "server/metrics.hpp"

#include <algorithm>
#include <sstream>

#include "server/model_slot.hpp"

namespace credence::server {

namespace {
// Label values are route patterns and hex fingerprints we choose, but escape
// anyway as the format requires (backslash, quote, newline).
std::string escape_label(const std::string& s) {
    std::string out;
    for (char c : s) {
        if (c == '\\') out += "\\\\";
        else if (c == '"') out += "\\\"";
        else if (c == '\n') out += "\\n";
        else out += c;
    }
    return out;
}
}  // namespace

const std::vector<double>& Metrics::latency_buckets_s() {
    static const std::vector<double> buckets = {0.0005, 0.001, 0.002, 0.005, 0.01, 0.02,
                                                0.05,   0.1,   0.25,  0.5,   1.0,  2.5};
    return buckets;
}

void Metrics::request_finished(const std::string& route, int status, double latency_s) {
    const auto& bounds = latency_buckets_s();
    const size_t bucket = std::lower_bound(bounds.begin(), bounds.end(), latency_s) - bounds.begin();
    std::lock_guard lock(mutex_);
    ++requests_[{route, status}];
    auto& lat = latency_[route];
    if (lat.bucket_counts.empty()) lat.bucket_counts.assign(bounds.size() + 1, 0);
    ++lat.bucket_counts[bucket];
    ++lat.count;
    lat.sum_s += latency_s;
    in_flight_.fetch_sub(1, std::memory_order_relaxed);
}

void Metrics::reload_finished(bool ok) { (ok ? reloads_ok_ : reloads_failed_).fetch_add(1); }

std::string Metrics::render(const LoadedModel* model) const {
    std::ostringstream out;
    out.precision(17);
    const auto& bounds = latency_buckets_s();
    {
        std::lock_guard lock(mutex_);
        out << "# HELP credence_http_requests_total HTTP requests answered, by route pattern and status.\n"
               "# TYPE credence_http_requests_total counter\n";
        for (const auto& [key, count] : requests_)
            out << "credence_http_requests_total{route=\"" << escape_label(key.first) << "\",status=\""
                << key.second << "\"} " << count << "\n";
        out << "# HELP credence_http_request_duration_seconds Time from routing to response, by route pattern.\n"
               "# TYPE credence_http_request_duration_seconds histogram\n";
        for (const auto& [route, lat] : latency_) {
            const std::string label = escape_label(route);
            uint64_t cumulative = 0;
            for (size_t b = 0; b < bounds.size(); ++b) {
                cumulative += lat.bucket_counts[b];
                out << "credence_http_request_duration_seconds_bucket{route=\"" << label << "\",le=\""
                    << bounds[b] << "\"} " << cumulative << "\n";
            }
            out << "credence_http_request_duration_seconds_bucket{route=\"" << label << "\",le=\"+Inf\"} "
                << lat.count << "\n";
            out << "credence_http_request_duration_seconds_sum{route=\"" << label << "\"} " << lat.sum_s << "\n";
            out << "credence_http_request_duration_seconds_count{route=\"" << label << "\"} " << lat.count << "\n";
        }
    }
    out << "# HELP credence_http_requests_in_flight Requests being answered now.\n"
           "# TYPE credence_http_requests_in_flight gauge\n"
           "credence_http_requests_in_flight "
        << in_flight_.load() << "\n";
    if (open_connections_)
        out << "# HELP credence_http_connections_open Connections queued or being served now (this scrape's "
               "included).\n"
               "# TYPE credence_http_connections_open gauge\n"
               "credence_http_connections_open "
            << open_connections_() << "\n";
    out << "# HELP credence_http_connections_refused_total Connections refused with 503 at the connection limit.\n"
           "# TYPE credence_http_connections_refused_total counter\n"
           "credence_http_connections_refused_total "
        << connections_refused_.load() << "\n";
    out << "# HELP credence_model_reloads_total Model reloads, by outcome.\n"
           "# TYPE credence_model_reloads_total counter\n"
           "credence_model_reloads_total{outcome=\"ok\"} "
        << reloads_ok_.load() << "\ncredence_model_reloads_total{outcome=\"failed\"} " << reloads_failed_.load()
        << "\n";
    out << "# HELP credence_model_loaded Whether a model is loaded (1) or not (0).\n"
           "# TYPE credence_model_loaded gauge\n"
           "credence_model_loaded "
        << (model ? 1 : 0) << "\n";
    if (model) {
        out << "# HELP credence_model_load_seconds Time to read, validate and prepare the served model.\n"
               "# TYPE credence_model_load_seconds gauge\n"
               "credence_model_load_seconds "
            << model->load_ms / 1000.0 << "\n";
        out << "# HELP credence_model_info The served model; the value is always 1.\n"
               "# TYPE credence_model_info gauge\n"
               "credence_model_info{fingerprint=\""
            << escape_label(model->fingerprint) << "\",samples=\"" << model->num_samples() << "\",rank=\""
            << model->rank() << "\"} 1\n";
        out << "# HELP credence_model_loaded_timestamp_seconds Unix time the served model was loaded.\n"
               "# TYPE credence_model_loaded_timestamp_seconds gauge\n"
               "credence_model_loaded_timestamp_seconds "
            << model->loaded_at_unix_s << "\n";
    }
    return out.str();
}

}  // namespace credence::server
