#include "model/posterior/model_summary.hpp"

#include <algorithm>
#include <cmath>
#include <string>
#include <utility>
#include <vector>

namespace credence {

namespace {

using nlohmann::json;

json parsed_object(const std::string& text) {
    json doc = json::parse(text, nullptr, /*allow_exceptions=*/false);
    return doc.is_object() ? doc : json::object();
}

// doc[a][b]... or null when any step is missing.
json at_path(const json& doc, std::initializer_list<const char*> path) {
    const json* at = &doc;
    for (const char* key : path) {
        if (!at->is_object()) return nullptr;
        const auto it = at->find(key);
        if (it == at->end()) return nullptr;
        at = &*it;
    }
    return *at;
}

double number_or(const json& value, double fallback) { return value.is_number() ? value.get<double>() : fallback; }

// The worst convergence quantities: highest R-hat first, then lowest bulk ESS.
json worst_quantities(const json& diagnostics, size_t count) {
    const json quantities = at_path(diagnostics, {"quantities"});
    std::vector<json> all;
    if (quantities.is_array())
        for (const auto& q : quantities)
            if (q.is_object()) all.push_back(q);
    std::stable_sort(all.begin(), all.end(), [](const json& a, const json& b) {
        const double ra = number_or(at_path(a, {"rhat"}), 0.0), rb = number_or(at_path(b, {"rhat"}), 0.0);
        if (ra != rb) return ra > rb;
        return number_or(at_path(a, {"ess_bulk"}), 0.0) < number_or(at_path(b, {"ess_bulk"}), 0.0);
    });
    json out = json::array();
    for (size_t k = 0; k < std::min(count, all.size()); ++k) {
        const json& q = all[k];
        std::string name = q.value("quantity", std::string("?"));
        if (q.contains("probe")) name += "(probe " + at_path(q, {"probe"}).dump() + ")";
        out.push_back({{"quantity", name}, {"r_hat", at_path(q, {"rhat"})}, {"ess_bulk", at_path(q, {"ess_bulk"})}});
    }
    return out;
}

json noise_summary(const Posterior& p, const json& fit) {
    const json sampled = at_path(fit, {"options", "sample_noise"});
    if (sampled.is_boolean() && !sampled.get<bool>()) {
        const double tau = p.noise_precision.empty() ? NAN : p.noise_precision.front();
        return {{"sampled", false}, {"precision", tau}, {"sd", 1.0 / std::sqrt(tau)}};
    }
    double sd_sum = 0.0;
    for (float tau : p.noise_precision) sd_sum += 1.0 / std::sqrt(static_cast<double>(tau));
    json out = {{"sampled", true}, {"sd_posterior_mean", nullptr}};
    if (!p.noise_precision.empty()) out["sd_posterior_mean"] = sd_sum / static_cast<double>(p.noise_precision.size());
    return out;
}

// How the chains started: "cold", or a warm start's counts without the
// file it began from (a path on the analyst's machine).
json warm_start_summary(const json& fit) {
    json start = at_path(fit, {"start"});
    if (!start.is_object()) return {{"kind", "cold"}};
    start.erase("from");
    return start;
}

// How the rank was settled: null for a rank given on the command line, else
// its source ("held_out" or "warm_start") with the candidates and the rule.
json rank_choice_summary(const json& fit) {
    const json c = at_path(fit, {"rank_choice"});
    if (!c.is_object()) return nullptr;
    json out = {{"source", at_path(c, {"source"})}};
    if (c.contains("candidates")) out["candidates"] = c["candidates"];
    if (c.contains("rule")) out["rule"] = c["rule"];
    return out;
}

}  // namespace

json public_diagnostics(const Posterior& p) {
    json doc = parsed_object(p.diagnostics_json);
    std::vector<std::pair<std::string, std::string>> named;  // "prediction(u, i)" -> "prediction(probe k)"
    if (auto it = doc.find("quantities"); it != doc.end() && it->is_array()) {
        for (auto& q : *it) {
            if (!q.is_object() || (!q.contains("user_id") && !q.contains("item_id"))) continue;
            const auto id = [&](const char* key) {
                const auto found = q.find(key);
                return found != q.end() && found->is_string() ? found->get<std::string>() : std::string();
            };
            const std::string user = id("user_id"), item = id("item_id");
            q.erase("user_id");
            q.erase("item_id");
            q["probe"] = named.size() + 1;
            named.emplace_back("prediction(" + user + ", " + item + ")",
                               "prediction(probe " + std::to_string(named.size() + 1) + ")");
        }
    }
    // Warnings and advice quote the worst quantity, which may be a probe pair.
    for (const char* key : {"warnings", "advice"}) {
        const auto it = doc.find(key);
        if (it == doc.end() || !it->is_array()) continue;
        for (auto& w : *it) {
            if (!w.is_string()) continue;
            std::string text = w.get<std::string>();
            for (const auto& [from, to] : named)
                for (size_t at = text.find(from); at != std::string::npos; at = text.find(from, at + to.size()))
                    text.replace(at, from.size(), to);
            w = text;
        }
    }
    return doc;
}

json fit_trace(const Posterior& p) {
    const json trace = at_path(parsed_object(p.fit_metadata_json), {"trace"});
    return trace.is_object() ? trace : json::object();
}

json model_summary(const Posterior& p) {
    const json fit = parsed_object(p.fit_metadata_json);
    const json diagnostics = public_diagnostics(p);
    json data = {{"customers", p.num_users}, {"products", p.num_items}, {"ratings", p.rated_items.size()}};
    if (p.has_catalogue())
        data["products_named"] =
            std::count_if(p.item_names.begin(), p.item_names.end(), [](const std::string& n) { return !n.empty(); });
    // The held-out check (fit --holdout or --validation): its kind and size,
    // with the figures the fit stored beside them (RMSE, MAE, log density,
    // coverage, the product-mean baseline) lifted to the same level.
    json validation = at_path(fit, {"validation"});
    if (validation.is_object() && validation.contains("figures") && validation["figures"].is_object()) {
        const json figures = validation["figures"];
        validation.erase("figures");
        validation.update(figures);
    }
    if (validation.is_object() && fit.contains("refit_on_all")) validation["refit_on_all"] = true;
    const json warnings = at_path(diagnostics, {"warnings"});
    const json advice = at_path(public_diagnostics(p), {"advice"});  // probe pairs numbered
    return {
        {"data", std::move(data)},
        {"rank", p.rank},
        {"biases", p.has_biases},
        {"scale", {{"min", p.scale.min}, {"max", p.scale.max}, {"declared", p.scale.declared}}},
        {"global_mean", p.global_mean},
        {"chains", p.num_chains},
        {"samples", p.num_samples},
        {"fit",
         {{"created_at", at_path(fit, {"created_at"})},
          {"credence_version", at_path(fit, {"credence_version"})},
          {"seconds", at_path(fit, {"timings", "total_s"})},
          {"sweeps_per_chain", at_path(fit, {"sweeps_per_chain"})},
          {"seed", at_path(fit, {"seed"})},
          {"data_fingerprint", at_path(fit, {"data_fingerprint"})},
          {"start", warm_start_summary(fit)},
          {"rank_choice", rank_choice_summary(fit)}}},
        {"convergence",
         {{"verdict", at_path(diagnostics, {"verdict"})},
          {"max_r_hat", at_path(diagnostics, {"max_rhat"})},
          {"min_ess_bulk_per_chain", at_path(diagnostics, {"min_ess_bulk_per_chain"})},
          {"min_ess_tail_per_chain", at_path(diagnostics, {"min_ess_tail_per_chain"})},
          {"warnings", warnings.is_array() ? warnings.size() : 0},
          {"worst", worst_quantities(diagnostics, 3)},
          {"advice", advice.is_array() ? advice : json::array()}}},
        {"validation", validation.is_object() && !validation.empty() ? validation : json(nullptr)},
        {"noise", noise_summary(p, fit)},
    };
}

}  // namespace credence
