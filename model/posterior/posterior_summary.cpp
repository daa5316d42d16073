// describe_posterior: the human-readable summary behind `credence inspect`.
//
// The fit metadata and diagnostics are free-form JSON written by other
// modules; this summary picks out a few well-known keys when present, at the
// top level or one object deep (e.g. "seed" or "options": {"seed": ...}):
//   fit metadata: seed, data_fingerprint, seconds, credence_version, created_at
//   diagnostics:  verdict, max_rhat, min_ess_bulk_per_chain,
//                 min_ess_tail_per_chain, warnings (counted)
// (the diagnostics keys are those of model/fit/convergence_summary.cpp).
#include "model/posterior/posterior_summary.hpp"

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <map>
#include <sstream>
#include <string>

#include <nlohmann/json.hpp>

#include "model/posterior/model_summary.hpp"
#include "model/posterior/posterior_file.hpp"


namespace credence {
namespace {

using nlohmann::json;

// The value under `key` at the top level, or in any top-level object member.
const json* find_key(const json& doc, const std::string& key) {
    if (!doc.is_object()) return nullptr;
    if (auto it = doc.find(key); it != doc.end()) return &*it;
    for (const auto& [name, value] : doc.items()) {
        (void)name;
        if (value.is_object())
            if (auto it = value.find(key); it != value.end()) return &*it;
    }
    return nullptr;
}

std::string scalar_text(const json& v) {
    if (v.is_string()) return v.get<std::string>();
    if (v.is_number_float()) {
        char buf[32];
        std::snprintf(buf, sizeof buf, "%.4g", v.get<double>());
        return buf;
    }
    return v.dump();
}

std::string fixed(double x, int digits) {
    char buf[64];
    std::snprintf(buf, sizeof buf, "%.*f", digits, x);
    return buf;
}

// "key1 value1, key2 value2" for the keys present; empty when none are.
std::string highlights(const std::string& text, const std::vector<std::pair<const char*, const char*>>& keys) {
    const json doc = json::parse(text, nullptr, /*allow_exceptions=*/false);
    if (doc.is_discarded()) return "(not valid JSON)";
    std::string out;
    for (const auto& [key, label] : keys)
        if (const json* v = find_key(doc, key); v && !v->is_null() && !v->is_structured())
            out += (out.empty() ? "" : ", ") + std::string(label) + " " + scalar_text(*v);
    return out;
}

std::string number_text(const json& j, const char* key, int digits) {
    return j.is_object() && j.contains(key) && j[key].is_number() ? fixed(j[key].get<double>(), digits) : "-";
}

// How the rank was settled (fit --rank auto, model/assess/rank_choice.hpp);
// empty for a rank given on the command line.
std::string rank_choice_line(const json& meta) {
    if (!meta.contains("rank_choice") || !meta["rank_choice"].is_object()) return {};
    const json& c = meta["rank_choice"];
    if (c.value("source", std::string()) == "warm_start") return "rank choice:    kept the warm-start model's rank\n";
    std::string candidates;
    if (c.contains("candidates") && c["candidates"].is_array())
        for (const auto& r : c["candidates"]) candidates += (candidates.empty() ? "" : ", ") + r.dump();
    return "rank choice:    " + (c.contains("rank") ? c["rank"].dump() : std::string("?")) + " of " + candidates +
           ": the simplest within one SE of the best held-out log density (short fits; " +
           (c.contains("held_out_ratings") ? c["held_out_ratings"].dump() : std::string("?")) +
           " training ratings held out for the choice)\n";
}

// The rank choice, held-out check, start, refit and gate lines; empty when
// the fit recorded none.
std::string retraining_lines(const std::string& fit_metadata) {
    const json meta = json::parse(fit_metadata, nullptr, false);
    if (meta.is_discarded() || !meta.is_object()) return {};
    std::string out;
    out += rank_choice_line(meta);
    if (meta.contains("validation") && meta["validation"].is_object() && meta["validation"].contains("figures")) {
        const json& f = meta["validation"]["figures"];
        const json base = f.contains("baseline") ? f["baseline"] : json::object();
        const json cover = f.contains("coverage") ? f["coverage"] : json::object();
        const json base_cover = base.contains("coverage") ? base["coverage"] : json::object();
        out += "held-out:       " + (f.contains("ratings") ? f["ratings"].dump() : std::string("?")) + " ratings (" +
               meta["validation"].value("kind", std::string("?")) + "): RMSE " + number_text(f, "rmse", 4) +
               " (product-mean baseline " + number_text(base, "rmse", 4) + "), mean log density " +
               number_text(f, "mean_log_predictive_density", 4) + " (baseline " +
               number_text(base, "mean_log_predictive_density", 4) + "), 90% coverage " + number_text(cover, "0.9", 3) +
               " (baseline " + number_text(base_cover, "0.9", 3) + ")\n";
    }
    if (meta.contains("start") && meta["start"].is_object()) {
        const json& st = meta["start"];
        out += "start:          " + st.value("kind", std::string("cold"));
        if (st.contains("from") && st["from"].is_string()) out += " from " + st["from"].get<std::string>();
        out += "\n";
    }
    if (meta.contains("refit_on_all"))
        out += "refit:          on every rating after the held-out check (the held-out figures are the check's)\n";
    if (meta.contains("gate") && meta["gate"].is_object())
        out += std::string("gate:           ") + (meta["gate"].value("passed", false) ? "passed" : "refused") + "\n";
    return out;
}

// The version in bytes 8..11 of the file (FORMAT.md section 3), which may be
// older than the one this build writes; the file was already read, so a
// short read only happens if it changed since: then "?".
std::string file_format_version(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    unsigned char head[12] = {};
    if (!in.read(reinterpret_cast<char*>(head), sizeof head)) return "?";
    return std::to_string(uint32_t{head[8]} | uint32_t{head[9]} << 8 | uint32_t{head[10]} << 16 |
                          uint32_t{head[11]} << 24);
}

}  // namespace

namespace {

// The worst quantities, every warning and the advice, one per line; probe
// pairs by number (public_diagnostics scrubs files written with ids).
std::string convergence_detail_lines(const Posterior& p) {
    std::ostringstream out;
    const json convergence = model_summary(p)["convergence"];
    std::string worst;
    for (const json& q : convergence.value("worst", json::array())) {
        if (!q.is_object()) continue;
        worst += (worst.empty() ? "" : "; ") + q.value("quantity", std::string("?")) + " (R-hat " +
                 scalar_text(q.value("r_hat", json(nullptr))) + ", bulk ESS " +
                 scalar_text(q.value("ess_bulk", json(nullptr))) + ")";
    }
    if (!worst.empty()) out << "worst:          " << worst << "\n";
    const json diagnostics = public_diagnostics(p);
    for (const char* key : {"warnings", "advice"}) {
        const auto it = diagnostics.find(key);
        if (it == diagnostics.end() || !it->is_array()) continue;
        for (const json& line : *it)
            if (line.is_string())
                out << (std::string(key) == "warnings" ? "warning:        " : "advice:         ") << line.get<std::string>()
                    << "\n";
    }
    return out.str();
}

}  // namespace

std::string describe_posterior(const Posterior& p, const std::string& path) {
    std::ostringstream out;
    std::error_code ec;
    const auto file_bytes = std::filesystem::file_size(path, ec);
    out << "posterior file: " << path;
    if (ec)
        out << " (size unavailable: " << ec.message() << ")\n";
    else
        out << " (" << file_bytes << " bytes, format version " << file_format_version(path) << ")\n";

    out << "shape:          " << p.num_users << " users x " << p.num_items << " items, rank " << p.rank << "\n";
    if (p.has_catalogue()) {
        size_t named = 0;
        for (const auto& n : p.item_names) named += !n.empty();
        out << "catalogue:      " << named << " of " << p.num_items << " products named\n";
    }

    std::map<uint32_t, uint32_t> per_chain;
    for (uint32_t c : p.sample_chain) per_chain[c]++;
    out << "samples:        " << p.num_samples << " kept over " << p.num_chains
        << (p.num_chains == 1 ? " chain" : " chains");
    if (!per_chain.empty()) {
        out << " (per chain:";
        for (const auto& [chain, n] : per_chain) out << " " << n;
        out << ")";
    }
    out << "\n";

    out << "biases:         " << (p.has_biases ? "user and item" : "none") << "\n";
    out << "rating scale:   [" << scalar_text(json(p.scale.min)) << ", " << scalar_text(json(p.scale.max)) << "] "
        << (p.scale.declared ? "(declared)" : "(observed in training data)") << "\n";
    out << "global mean:    " << fixed(p.global_mean, 4) << "\n";

    if (!p.noise_precision.empty()) {
        double sd_sum = 0.0;
        for (float tau : p.noise_precision) sd_sum += 1.0 / std::sqrt(static_cast<double>(tau));
        out << "mean noise sd:  " << fixed(sd_sum / static_cast<double>(p.noise_precision.size()), 4) << "\n";
    }
    out << "rated pairs:    " << p.rated_items.size() << "\n";

    const std::string fit = highlights(p.fit_metadata_json, {{"seed", "seed"},
                                                             {"data_fingerprint", "data fingerprint"},
                                                             {"seconds", "fit seconds"},
                                                             {"credence_version", "credence version"},
                                                             {"created_at", "created at"}});
    out << "fit metadata:   " << (fit.empty() ? "(none recorded)" : fit) << "\n";
    std::string diag = highlights(p.diagnostics_json, {{"verdict", "verdict"},
                                                       {"max_rhat", "max R-hat"},
                                                       {"min_ess_bulk_per_chain", "min bulk ESS per chain"},
                                                       {"min_ess_tail_per_chain", "min tail ESS per chain"}});
    const json diag_doc = json::parse(p.diagnostics_json, nullptr, false);
    if (const json* w = diag_doc.is_discarded() ? nullptr : find_key(diag_doc, "warnings"); w && w->is_array())
        diag += (diag.empty() ? "" : ", ") + std::to_string(w->size()) + (w->size() == 1 ? " warning" : " warnings");
    out << "diagnostics:    " << (diag.empty() ? "(none recorded)" : diag) << "\n";
    out << convergence_detail_lines(p);
    out << retraining_lines(p.fit_metadata_json);
    return out.str();
}

}  // namespace credence
