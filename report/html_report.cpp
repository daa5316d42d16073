// The HTML model report (report/html_report.hpp). Each section is built by
// its own function from the posterior and the optional inputs; plots come
// from report/svg_plot.hpp.
#include "report/html_report.hpp"

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include <algorithm>
#include <cmath>
#include <map>
#include <optional>
#include <stdexcept>

#include "model/fit/convergence_summary.hpp"
#include "model/posterior/posterior.hpp"
#include "model/predict/item_statistics.hpp"
#include "model/predict/predict.hpp"
#include "report/svg_plot.hpp"

namespace credence::report {

namespace {

// The report names no customer: a probe pair (a rated customer-product
// pair) is shown by its number among the probes.
std::string probe_name(const ConvergenceSummary& conv, const QuantityConvergence& q) {
    int k = 0;
    for (const QuantityConvergence& other : conv.quantities) {
        if (other.quantity != "prediction") continue;
        ++k;
        if (&other == &q) break;
    }
    return fmt::format("probe pair {}", k);
}

// A warning with every probe's label replaced by its number.
std::string without_ids(const ConvergenceSummary& conv, std::string text) {
    for (const QuantityConvergence& q : conv.quantities) {
        if (q.quantity != "prediction") continue;
        // Files written before labels dropped the ids quote the pair; newer ones its number.
        const std::string to = probe_name(conv, q);
        for (const std::string& from : {q.id_label(), q.label()})
            for (size_t at = text.find(from); at != std::string::npos; at = text.find(from, at + to.size()))
                text.replace(at, from.size(), to);
    }
    return text;
}

std::string fixed(double v, int digits) {
    return std::isfinite(v) ? fmt::format("{:.{}f}", v, digits) : std::string("&ndash;");
}

PlotSpec make_spec(std::string id, std::string title, std::string x_label, std::string y_label) {
    PlotSpec spec;
    spec.id = std::move(id);
    spec.title = std::move(title);
    spec.x_label = std::move(x_label);
    spec.y_label = std::move(y_label);
    return spec;
}

Series make_series(std::string label, SeriesKind kind) {
    Series s;
    s.label = std::move(label);
    s.kind = kind;
    return s;
}

const char* kStyle = R"CSS(
:root { --ink:#1d2530; --muted:#6b6f76; --paper:#f4f1ea; --card:#ffffff; --line:#ddd7ca; --accent:#1f4e79;
        --good:#2a7d4f; --bad:#b23a24; --warn:#a66b00; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 14px/1.5 "DejaVu Sans", "Liberation Sans", system-ui, sans-serif; }
header { background:var(--accent); color:#fff; padding:22px 40px 18px; }
header h1 { margin:0; font-size:22px; font-weight:600; letter-spacing:.2px; }
header .sub { opacity:.85; font-size:13px; margin-top:4px; }
main { max-width:1200px; margin:0 auto; padding:8px 40px 40px; }
section { background:var(--card); border:1px solid var(--line); border-radius:6px; margin:22px 0; padding:18px 22px; }
section h2 { margin:0 0 4px; font-size:17px; font-weight:600; }
section p.note { margin:2px 0 12px; color:var(--muted); font-size:12.5px; max-width:900px; }
.facts { display:flex; flex-wrap:wrap; gap:10px 28px; margin-top:6px; }
.facts div { font-size:13px; } .facts b { display:block; font-size:18px; font-weight:600; }
.badge { display:inline-block; padding:2px 10px; border-radius:12px; font-size:12.5px; font-weight:600; color:#fff; }
.badge.converged { background:var(--good); } .badge.not_converged { background:var(--bad); }
.badge.not_assessable { background:var(--warn); }
.grid { display:flex; flex-wrap:wrap; gap:14px; }
.grid svg { border-radius:4px; }
table { border-collapse:collapse; font-size:12.5px; margin:6px 0; }
th, td { padding:4px 10px; text-align:right; border-bottom:1px solid #eee9de; }
th { background:#f7f5ef; font-weight:600; color:#333; }
td:first-child, th:first-child { text-align:left; }
td.bad { color:var(--bad); font-weight:600; }
td { white-space:nowrap; }
.grid.tables { gap:28px; align-items:flex-start; }
tr.pick td { background:#eef4fa; font-weight:600; }
ul.warnings { color:var(--bad); margin:6px 0; padding-left:20px; font-size:13px; }
p.verdict { font-size:15px; font-weight:600; margin:4px 0 10px; }
footer { color:var(--muted); font-size:12px; text-align:center; padding:8px 0 30px; }
)CSS";

nlohmann::json parse_or_empty(const std::string& text) {
    nlohmann::json j = nlohmann::json::parse(text, nullptr, false);
    return j.is_discarded() || !j.is_object() ? nlohmann::json::object() : j;
}

// ---- header facts
std::string overview(const ReportInputs& in, const ConvergenceSummary& conv, const nlohmann::json& meta) {
    const Posterior& p = *in.posterior;
    std::string ratings = "&ndash;";
    if (meta.contains("data") && meta["data"].contains("ratings") && meta["data"]["ratings"].is_number())
        ratings = fmt::format("{}", meta["data"]["ratings"].get<uint64_t>());
    std::string o = "<section id=\"overview\"><h2>Model</h2><div class=\"facts\">";
    auto fact = [&](const std::string& label, const std::string& value) {
        o += fmt::format("<div><b>{}</b>{}</div>", value, label);
    };
    fact("rank (latent factors)", std::to_string(p.rank));
    fact("customers", std::to_string(p.num_users));
    fact("products", std::to_string(p.num_items));
    fact("training ratings", ratings);
    fact("kept samples", std::to_string(p.num_samples));
    fact("chains", std::to_string(p.num_chains));
    fact("bias terms", p.has_biases ? "yes" : "no");
    if (p.has_catalogue()) {
        const auto named = std::count_if(p.item_names.begin(), p.item_names.end(), [](const std::string& n) { return !n.empty(); });
        fact("products named by the catalogue", std::to_string(named));
    }
    fact("rating scale", fmt::format("{:g} to {:g}", p.scale.min, p.scale.max));
    o += fmt::format("<div><b><span class=\"badge {0}\">{1}</span></b>convergence verdict</div>", conv.verdict,
                     escape_xml(conv.verdict == "not_converged" ? "not converged"
                                : conv.verdict == "not_assessable" ? "not assessable" : conv.verdict));
    o += "</div></section>\n";
    return o;
}

// ---- provenance and the verdict on fitness for use

std::string meta_text(const nlohmann::json& meta, std::initializer_list<const char*> path) {
    const nlohmann::json* at = &meta;
    for (const char* key : path) {
        if (!at->is_object() || !at->contains(key)) return "&ndash;";
        at = &(*at)[key];
    }
    if (at->is_string()) return escape_xml(at->get<std::string>());
    if (at->is_null()) return "&ndash;";
    return escape_xml(at->dump());
}

// How the fit settled its rank (fit --rank auto): "fixed" (given on the command
// line or by default before the choice existed), "kept from the warm start", or
// "auto of 2, 4, 8, 16".
std::string rank_choice_text(const nlohmann::json& meta) {
    if (!meta.contains("rank_choice") || !meta["rank_choice"].is_object()) return "fixed";
    const nlohmann::json& c = meta["rank_choice"];
    if (c.value("source", std::string()) == "warm_start") return "kept from the warm start";
    std::string ranks;
    if (c.contains("candidates") && c["candidates"].is_array())
        for (const auto& r : c["candidates"]) ranks += (ranks.empty() ? "" : ", ") + escape_xml(r.dump());
    return "auto of " + ranks;
}

std::string provenance(const nlohmann::json& meta, const std::string& verdict_line) {
    const bool fixed = meta_text(meta, {"run_length", "mode"}) == "fixed";
    std::string o = "<section id=\"provenance\"><h2>Provenance</h2>";
    o += fmt::format("<p class=\"verdict\" id=\"fitness\">{}</p><div class=\"facts\">", escape_xml(verdict_line));
    auto fact = [&](const std::string& label, const std::string& value) {
        o += fmt::format("<div><b>{}</b>{}</div>", value, label);
    };
    fact("model created (UTC)", meta_text(meta, {"created_at"}));
    fact("report written (UTC)", utc_now_iso8601());
    fact("Credence version", meta_text(meta, {"credence_version"}));
    fact("seed", meta_text(meta, {"seed"}));
    fact("sampler kernels (CPU level)", meta_text(meta, {"kernels"}));
    fact("sweeps per chain", meta_text(meta, {"sweeps_per_chain"}));
    fact("burn-in (sweeps per chain)", meta_text(meta, {"run_length", "burn_in"}));
    fact(fixed ? "kept draws per chain, thin" : "kept draws per chain",
         fixed ? meta_text(meta, {"options", "samples"}) + ", " + meta_text(meta, {"options", "thin"})
               : meta_text(meta, {"options", "samples"}));
    fact("run length", meta_text(meta, {"run_length", "mode"}) + " (" + meta_text(meta, {"run_length", "stop_reason"}) + ")");
    fact("start", meta_text(meta, {"start", "kind"}));
    fact("rank chosen", rank_choice_text(meta));
    fact("data fingerprint", "<code>" + meta_text(meta, {"data_fingerprint"}) + "</code>");
    o += "</div></section>\n";
    return o;
}

// The held-out figures the fit stored (fit --holdout), beside the baseline.
std::string stored_held_out(const nlohmann::json& meta) {
    if (!meta.contains("validation") || !meta["validation"].is_object() || !meta["validation"].contains("figures"))
        return {};
    const auto& v = meta["validation"];
    const auto& f = v["figures"];
    auto num = [](const nlohmann::json& j, const char* key) {
        return j.is_object() && j.contains(key) && j[key].is_number() ? j[key].get<double>() : NAN;
    };
    const nlohmann::json base = f.contains("baseline") ? f["baseline"] : nlohmann::json::object();
    auto cover = [&](const nlohmann::json& j) {
        return j.is_object() && j.contains("coverage") && j["coverage"].contains("0.9") &&
                       j["coverage"]["0.9"].is_number()
                   ? j["coverage"]["0.9"].get<double>()
                   : NAN;
    };
    std::string o = "<section id=\"held-out\"><h2>Held-out check</h2>";
    o += fmt::format("<p class=\"note\">Stored by the fit: {} ratings {} were set aside before fitting and scored "
                     "afterwards.{}</p>",
                     meta_text(f, {"ratings"}),
                     v.value("kind", "") == "holdout" ? fmt::format("({} of the export)", meta_text(v, {"fraction"}))
                                                      : std::string("(a separate file)"),
                     meta.contains("refit_on_all") ? " The served model was then refitted on every rating." : "");
    o += "<table class=\"held-out\"><thead><tr><th>figure</th><th>model</th><th>product-mean baseline</th></tr>"
         "</thead><tbody>";
    o += fmt::format("<tr><td>RMSE (rating units)</td><td>{}</td><td>{}</td></tr>", fixed(num(f, "rmse"), 4),
                     fixed(num(base, "rmse"), 4));
    o += fmt::format("<tr><td>MAE (rating units)</td><td>{}</td><td>{}</td></tr>", fixed(num(f, "mae"), 4),
                     fixed(num(base, "mae"), 4));
    o += fmt::format("<tr><td>mean log predictive density (nats)</td><td>{}</td><td>{}</td></tr>",
                     fixed(num(f, "mean_log_predictive_density"), 4),
                     fixed(num(base, "mean_log_predictive_density"), 4));
    o += fmt::format("<tr><td>90% interval coverage</td><td>{}</td><td>{}</td></tr>", fixed(cover(f), 3),
                     fixed(cover(base), 3));
    o += "</tbody></table></section>\n";
    return o;
}

// The rank choice the fit made (fit --rank auto): each candidate's held-out
// log density and its difference to the best, the chosen one marked; empty
// when the rank was given or kept from a warm start.
std::string stored_rank_choice(const nlohmann::json& meta) {
    if (!meta.contains("rank_choice") || !meta["rank_choice"].is_object()) return {};
    const nlohmann::json& c = meta["rank_choice"];
    if (c.value("source", std::string()) != "held_out" || !c.contains("scores") || !c["scores"].is_array()) return {};
    auto num = [](const nlohmann::json& j, const char* key) {
        return j.is_object() && j.contains(key) && j[key].is_number() ? j[key].get<double>() : NAN;
    };
    std::string o = "<section id=\"rank-choice\"><h2>Rank choice</h2>";
    o += fmt::format("<p class=\"note\">Before sampling, the fit held out {} of its training ratings, fitted each "
                     "candidate rank briefly on the rest and took {}.</p>",
                     meta_text(c, {"held_out_ratings"}), escape_xml(c.value("rule", std::string("the recommended one"))));
    o += "<table class=\"rank-choice\"><thead><tr><th>rank</th><th>held-out mean log density (nats)</th>"
         "<th>difference to the best (paired SE)</th><th></th></tr></thead><tbody>";
    const double chosen = num(c, "rank");
    for (const auto& row : c["scores"])
        o += fmt::format("<tr><td>{}</td><td>{}</td><td>{} ({})</td><td>{}</td></tr>", meta_text(row, {"rank"}),
                         fixed(num(row, "mean_log_predictive_density"), 4), fixed(num(row, "difference_to_best"), 4),
                         fixed(num(row, "difference_se"), 4), num(row, "rank") == chosen ? "chosen" : "");
    o += "</tbody></table></section>\n";
    return o;
}

// ---- traces of every sweep from the fit metadata
std::string sweep_traces(const nlohmann::json& meta) {
    std::string o = "<section id=\"traces\"><h2>Sampler traces</h2>";
    const auto trace = meta.contains("trace") ? meta["trace"] : nlohmann::json();
    if (!trace.is_object() || !trace.contains("chain") || !trace.contains("sweep") || !trace.contains("noise_precision")) {
        return o + "<p class=\"note\">The fit metadata holds no per-sweep trace, so there is nothing to plot.</p></section>\n";
    }
    const auto chain = trace["chain"].get<std::vector<uint32_t>>();
    const auto sweep = trace["sweep"].get<std::vector<uint32_t>>();
    const auto tau = trace["noise_precision"].get<std::vector<double>>();
    std::vector<double> rmse;
    if (trace.contains("train_rmse")) rmse = trace["train_rmse"].get<std::vector<double>>();
    double burn_in = -1;
    if (meta.contains("run_length") && meta["run_length"].contains("burn_in"))
        burn_in = meta["run_length"]["burn_in"].get<double>();
    else if (meta.contains("options") && meta["options"].contains("burn_in"))
        burn_in = meta["options"]["burn_in"].get<double>();
    o += "<p class=\"note\">Every sweep of every chain, burn-in included. Chains that started apart and now "
         "overlap, with no drift after the dashed line, have forgotten their starting points.</p><div class=\"grid\">";
    auto plot = [&](const std::vector<double>& values, const std::string& id, const std::string& title,
                    const std::string& ylabel) {
        std::map<uint32_t, Series> by_chain;
        for (size_t j = 0; j < chain.size() && j < sweep.size() && j < values.size(); ++j) {
            Series& s = by_chain[chain[j]];
            s.label = fmt::format("chain {}", chain[j] + 1);
            s.x.push_back(sweep[j] + 1.0);
            s.y.push_back(values[j]);
        }
        std::vector<Series> series;
        for (auto& [c, s] : by_chain) series.push_back(std::move(s));
        PlotSpec spec = make_spec(id, title, "sweep (count)", ylabel);
        spec.width_px = 520;
        if (burn_in > 0 && !values.empty()) {
            double lo = *std::min_element(values.begin(), values.end()), hi = *std::max_element(values.begin(), values.end());
            spec.guides.push_back({burn_in + 0.5, lo, burn_in + 0.5, hi, "end of burn-in"});
        }
        o += render_svg(spec, series);
    };
    plot(tau, "trace-noise-precision", "Noise precision \xcf\x84 per sweep", "\xcf\x84 (1 / rating unit\xc2\xb2)");
    if (!rmse.empty()) plot(rmse, "trace-train-rmse", "Training RMSE per sweep", "RMSE (rating units)");
    o += "</div></section>\n";
    return o;
}

// ---- probe predictions over kept samples
std::string probe_traces(const ReportInputs& in, const ConvergenceSummary& conv) {
    const Posterior& p = *in.posterior;
    std::string o = "<section id=\"probes\"><h2>Probe predictions over kept samples</h2>"
                    "<p class=\"note\">The predicted mean rating of fixed rated (customer, product) pairs in each kept "
                    "sample, one line per chain. Well-mixed chains trace the same band.</p><div class=\"grid\">";
    std::map<std::string, uint32_t> user_index, item_index;
    for (uint32_t u = 0; u < p.num_users; ++u) user_index[p.user_ids[u]] = u;
    for (uint32_t i = 0; i < p.num_items; ++i) item_index[p.item_ids[i]] = i;
    uint32_t drawn = 0;
    for (const QuantityConvergence& q : conv.quantities) {
        if (q.quantity != "prediction" || drawn >= in.max_probe_plots) continue;
        const uint32_t u = user_index.at(q.user_id), i = item_index.at(q.item_id);
        std::map<uint32_t, Series> by_chain;
        std::map<uint32_t, uint32_t> position;
        for (uint32_t s = 0; s < p.num_samples; ++s) {
            const uint32_t c = p.sample_chain[s];
            Series& series = by_chain[c];
            series.label = fmt::format("chain {}", c + 1);
            series.x.push_back(++position[c]);
            series.y.push_back(p.sample_prediction(s, u, i));
        }
        std::vector<Series> series;
        for (auto& [c, s] : by_chain) series.push_back(std::move(s));
        PlotSpec spec = make_spec(fmt::format("trace-probe-{}", drawn + 1),
                                  probe_name(conv, q),
                                  "kept sample within chain (count)", "predicted rating (rating units)");
        spec.note = "R-hat " + fixed(q.stats.rhat, 3);
        spec.width_px = 342;
        spec.height_px = 240;
        spec.legend = drawn == 0;
        o += render_svg(spec, series);
        ++drawn;
    }
    if (drawn == 0) o += "<p class=\"note\">No probe pairs: the posterior has no rated pairs.</p>";
    o += "</div></section>\n";
    return o;
}

// ---- R-hat / ESS table
std::string convergence_table(const ConvergenceSummary& conv) {
    std::string o = "<section id=\"convergence\"><h2>Convergence: R-hat and effective sample size</h2>";
    o += fmt::format("<p class=\"note\">Rank-normalized split R-hat and bulk / tail ESS (Vehtari, Gelman, Simpson, "
                     "Carpenter &amp; B\xc3\xbcrkner 2021) over {} chains of {} draws ({}). Flagged rows exceed "
                     "R-hat {:g} or fall under {:g} effective draws per chain.</p>",
                     conv.num_chains, conv.draws_per_chain,
                     conv.assessed == "every_sweep"
                         ? fmt::format("every sweep from sweep {} on, as the sampler recorded them", conv.first_sweep)
                         : std::string("the kept samples"),
                     conv.options.max_rhat, conv.options.min_ess_per_chain);
    if (!conv.warnings.empty() || !conv.advice.empty()) {
        o += "<ul class=\"warnings\">";
        for (const auto& w : conv.warnings) o += "<li>" + escape_xml(without_ids(conv, w)) + "</li>";
        for (const auto& a : conv.advice) o += "<li>Advice: " + escape_xml(without_ids(conv, a)) + "</li>";
        o += "</ul>";
    }
    const double chains = std::max<double>(1, conv.num_chains);
    auto table = [&](bool predictions) {
        std::string t = fmt::format("<table class=\"diagnostics\"><thead><tr><th>{}</th><th>R-hat</th><th>bulk ESS</th>"
                                    "<th>tail ESS</th><th>bulk / chain</th></tr></thead><tbody>",
                                    predictions ? "probe prediction" : "quantity");
        for (const QuantityConvergence& q : conv.quantities) {
            if ((q.quantity == "prediction") != predictions) continue;
            const auto& st = q.stats;
            const double min_ess = conv.options.min_ess_per_chain * chains;
            auto cell = [](bool bad, const std::string& text) {
                return fmt::format("<td{}>{}</td>", bad ? " class=\"bad\"" : "", text);
            };
            const std::string name = predictions ? probe_name(conv, q) : q.label();
            t += "<tr><td>" + escape_xml(name) + "</td>" +
                 cell(std::isfinite(st.rhat) && st.rhat > conv.options.max_rhat, fixed(st.rhat, 3)) +
                 cell(std::isfinite(st.ess_bulk) && st.ess_bulk < min_ess, fixed(st.ess_bulk, 0)) +
                 cell(std::isfinite(st.ess_tail) && st.ess_tail < min_ess, fixed(st.ess_tail, 0)) +
                 cell(false, fixed(st.ess_bulk / chains, 0)) + "</tr>";
        }
        return t + "</tbody></table>";
    };
    o += "<div class=\"grid tables\">" + table(false) + table(true) + "</div>";
    o += "<p class=\"note\">Figures in red miss a threshold.</p></section>\n";
    return o;
}

// The rated products with the largest averaged predictive sd, by id and,
// when the model has a catalogue, name and category.
std::string least_sure_table(const Posterior& p, const std::vector<uint32_t>& count, const std::vector<double>& sd) {
    constexpr size_t kShown = 10;
    std::vector<uint32_t> order;
    for (uint32_t i = 0; i < p.num_items; ++i)
        if (count[i] > 0) order.push_back(i);
    const size_t take = std::min(kShown, order.size());
    std::partial_sort(order.begin(), order.begin() + static_cast<std::ptrdiff_t>(take), order.end(),
                      [&](uint32_t a, uint32_t b) { return sd[a] != sd[b] ? sd[a] > sd[b] : a < b; });
    if (take == 0) return "";
    const bool named = p.has_catalogue();
    std::string t = fmt::format("<h3>The {} products the model is least sure about</h3>"
                                "<table class=\"diagnostics\"><thead><tr><th>product</th>{}<th>training ratings</th>"
                                "<th>predictive sd</th></tr></thead><tbody>",
                                take, named ? "<th>name</th><th>category</th>" : "");
    for (size_t k = 0; k < take; ++k) {
        const uint32_t i = order[k];
        t += "<tr><td>" + escape_xml(p.item_ids[i]) + "</td>";
        if (named) t += "<td>" + escape_xml(p.item_name(i)) + "</td><td>" + escape_xml(p.item_category(i)) + "</td>";
        t += fmt::format("<td>{}</td><td>{}</td></tr>", count[i], fixed(sd[i], 3));
    }
    return t + "</tbody></table>";
}

// ---- predictive sd against how many ratings an item has
std::string uncertainty_by_item(const ReportInputs& in) {
    const Posterior& p = *in.posterior;
    // The figures GET /v1/items shows (model/predict/item_statistics.hpp):
    // each customer's predictive sd for the product, averaged over customers.
    const ItemStatistics st = compute_item_statistics(p);
    const std::vector<uint32_t>& count = st.rating_count;
    const std::vector<double>& sd = st.predictive_sd;
    Series pts = make_series("", SeriesKind::points);
    pts.point_radius = p.num_items > 2000 ? 1.6 : 2.6;
    pts.opacity = p.num_items > 2000 ? 0.45 : 0.75;
    uint32_t unrated = 0;
    for (uint32_t i = 0; i < p.num_items; ++i) {
        if (count[i] == 0) {
            ++unrated;
            continue;
        }
        pts.x.push_back(count[i]);
        pts.y.push_back(sd[i]);
    }
    // The floor every prediction carries: the rating noise alone.
    double noise_sd = 0.0;
    for (float t : p.noise_precision) noise_sd += 1.0 / t;
    noise_sd = std::sqrt(noise_sd / p.num_samples);
    PlotSpec spec = make_spec("sd-by-count", "Predictive sd by product popularity", "training ratings of the product (count, log scale)", "predictive sd (rating units)");
    spec.width_px = 760;
    spec.height_px = 340;
    spec.log_x = true;
    spec.legend = false;
    if (!pts.x.empty()) {
        const double hi = *std::max_element(pts.x.begin(), pts.x.end());
        spec.guides.push_back({1, noise_sd, std::max(10.0, std::pow(10.0, std::ceil(std::log10(hi)))), noise_sd,
                               ""});
    }
    std::string o = "<section id=\"uncertainty\"><h2>Uncertainty against evidence</h2>";
    o += fmt::format("<p class=\"note\">Each dot is a product: its predictive sd, averaged over the model's {} "
                     "customers (as GET /v1/items shows it), against how many training ratings it has. The dashed "
                     "line is the rating noise alone (sd {:.3f}); sparse products should sit higher.{}</p>",
                     p.num_users, noise_sd,
                     unrated ? fmt::format(" {} products with no training rating are not shown.", unrated) : "");
    o += render_svg(spec, {pts});
    o += least_sure_table(p, count, sd);
    o += "</section>\n";
    return o;
}

// ---- calibration of a validation set
std::string calibration(const ReportInputs& in) {
    const EvaluationReport& r = *in.validation;
    std::string o = "<section id=\"calibration\"><h2>Calibration on held-out ratings</h2>";
    o += fmt::format("<p class=\"note\">{} ratings of <code>{}</code> scored ({} with an unknown customer, {} with an "
                     "unknown product skipped). RMSE {} &middot; MAE {} &middot; mean log predictive density {}.</p>",
                     r.rated, escape_xml(in.validation_name), r.unknown_users, r.unknown_items, fixed(r.rmse, 4),
                     fixed(r.mae, 4), fixed(r.mean_log_predictive_density, 4));
    o += "<div class=\"grid\">";
    Series curve = make_series("observed coverage \xc2\xb1 2 SE", SeriesKind::points);
    Series line = make_series("", SeriesKind::line);
    for (const CoveragePoint& pt : r.coverage_curve) {
        curve.x.push_back(pt.level);
        curve.y.push_back(pt.coverage);
        curve.y_error.push_back(2 * pt.standard_error);
        line.x.push_back(pt.level);
        line.y.push_back(pt.coverage);
    }
    curve.point_radius = 3.2;
    line.color = palette()[0];
    PlotSpec cspec = make_spec("coverage-curve", "Coverage of central intervals", "nominal level (probability)", "share of ratings inside (probability)");
    cspec.x_min = 0, cspec.x_max = 1, cspec.y_min = 0, cspec.y_max = 1;
    cspec.width_px = 520;
    cspec.height_px = 380;
    cspec.guides.push_back({0, 0, 1, 1, ""});
    o += render_svg(cspec, {curve, line});

    const PitHistogram& h = r.pit_histogram;
    Series bars = make_series("ratings per bin", SeriesKind::bars);
    const double B = static_cast<double>(h.counts.size());
    for (size_t b = 0; b < h.counts.size(); ++b) {
        bars.x.push_back((b + 0.5) / B);
        bars.y.push_back(static_cast<double>(h.counts[b]));
    }
    bars.bar_width = 0.92 / B;
    bars.color = palette()[2];
    const double expected = h.total / std::max(1.0, B);
    PlotSpec hspec = make_spec("pit-histogram", fmt::format("PIT histogram (\xcf\x87\xc2\xb2 = {} on {} df)",
                                                                fixed(h.chi_square, 1), h.degrees_of_freedom), "probability integral transform (probability)", "ratings (count)");
    hspec.x_min = 0, hspec.x_max = 1;
    hspec.width_px = 520;
    hspec.height_px = 380;
    hspec.guides.push_back({0, expected, 1, expected, ""});
    o += render_svg(hspec, {bars});
    o += "</div>";
    o += "<p class=\"note\">Points on the diagonal and a flat histogram (dashed: the count a calibrated model "
         "expects) mean the intervals are honest. A U-shaped histogram means overconfident intervals; a hump, "
         "intervals wider than needed.</p>";
    if (!r.ranking.empty()) {
        o += fmt::format("<table class=\"ranking\"><thead><tr><th>rank by</th><th>precision@{0}</th><th>recall@{0}</th>"
                         "<th>NDCG@{0}</th><th>catalogue coverage</th><th>customers</th></tr></thead><tbody>",
                         r.ranking_k);
        for (const auto& [mode, m] : r.ranking)
            o += fmt::format("<tr><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>", mode,
                             fixed(m.precision_at_k, 4), fixed(m.recall_at_k, 4), fixed(m.ndcg_at_k, 4),
                             fixed(m.catalogue_coverage, 4), m.users_evaluated);
        o += fmt::format("</tbody></table><p class=\"note\">Top-{} lists over all products a customer did not rate in "
                         "training; a held-out rating of at least {:g} counts as relevant.</p>",
                         r.ranking_k, r.relevance_threshold);
    }
    o += "</section>\n";
    return o;
}

// ---- rank comparison
std::string comparison(const ComparisonResult& c) {
    std::string o = "<section id=\"comparison\"><h2>Which rank?</h2>";
    o += fmt::format("<p class=\"note\">Held-out mean log predictive density (higher is better) with one standard "
                     "error, {}. Recommended: {}.</p>",
                     c.folds >= 2 ? fmt::format("{} folds", c.folds)
                                  : fmt::format("one holdout of {:.0f}% of the ratings", 100 * c.holdout_fraction),
                     escape_xml(c.rule));
    std::map<bool, Series> by_bias;
    for (const ConfigScore& s : c.configs) {
        Series& series = by_bias[s.biases];
        series.label = s.biases ? "with biases" : "without biases";
        series.kind = SeriesKind::line;
        series.x.push_back(s.rank);
        series.y.push_back(s.mean_log_predictive_density);
        series.y_error.push_back(s.mean_log_predictive_density_se);
    }
    std::vector<Series> series;
    for (auto& [b, s] : by_bias) {
        Series dots = s;
        dots.label = "";
        dots.kind = SeriesKind::points;
        dots.point_radius = 3.5;
        dots.color = palette()[b ? 1 : 0];
        s.color = dots.color;
        s.y_error.clear();
        series.push_back(std::move(s));
        series.push_back(std::move(dots));
    }
    const ConfigScore& rec = c.configs[c.recommended];
    Series pick = make_series(fmt::format("recommended (rank {})", rec.rank), SeriesKind::points);
    pick.x = {static_cast<double>(rec.rank)};
    pick.y = {rec.mean_log_predictive_density};
    pick.point_radius = 7;
    pick.color = "#c2452d";
    pick.opacity = 0.55;
    series.push_back(pick);
    PlotSpec spec = make_spec("rank-comparison", "Held-out mean log predictive density by rank", "rank (latent factors)", "mean log density (nats per rating)");
    spec.width_px = 620;
    spec.height_px = 340;
    o += "<div class=\"grid\">" + render_svg(spec, series) + "</div>";
    o += fmt::format("<table class=\"comparison\"><thead><tr><th>rank</th><th>biases</th><th>parameters</th>"
                     "<th>mean log density</th><th>SE</th><th>difference to best</th><th>SE</th><th>RMSE</th>"
                     "<th>{:.0f}% coverage</th><th>WAIC per rating</th><th>p_waic</th></tr></thead><tbody>",
                     100 * c.coverage_level);
    for (size_t j = 0; j < c.configs.size(); ++j) {
        const ConfigScore& s = c.configs[j];
        o += fmt::format("<tr{}><td>{}{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td>"
                         "<td>{}</td><td>{}</td><td>{}</td><td>{}</td></tr>",
                         j == c.recommended ? " class=\"pick\"" : "", s.rank,
                         j == c.recommended ? " &#9664; recommended" : (j == c.best ? " (best)" : ""),
                         s.biases ? "on" : "off", s.parameters, fixed(s.mean_log_predictive_density, 4),
                         fixed(s.mean_log_predictive_density_se, 4), fixed(s.difference_to_best, 4),
                         fixed(s.difference_se, 4), fixed(s.rmse, 4), fixed(s.coverage, 3),
                         fixed(s.waic_elpd_per_rating, 4) + (s.waic_reliable() ? "" : " *"), fixed(s.p_waic, 0));
    }
    o += "</tbody></table>";
    bool unreliable = false;
    for (const ConfigScore& s : c.configs) unreliable = unreliable || !s.waic_reliable();
    if (unreliable)
        o += "<p class=\"note\" id=\"waic-unreliable\">* WAIC is unreliable there: some training ratings have a "
             "log-likelihood variance over samples above 0.4 (Vehtari, Gelman &amp; Gabry 2017); judge by the held-out "
             "log density.</p>";
    o += "</section>\n";
    return o;
}

struct HeldOut {
    double rmse = NAN, lpd = NAN, base_rmse = NAN, base_lpd = NAN;
    uint64_t ratings = 0;
    std::string where;
};

// The held-out figures the verdict judges by: a --validation report, else
// those the fit stored.
std::optional<HeldOut> held_out_for_verdict(const ReportInputs& in, const nlohmann::json& meta) {
    if (in.validation && in.validation->rated > 0) {
        const EvaluationReport& r = *in.validation;
        return HeldOut{r.rmse, r.mean_log_predictive_density, r.baseline.available ? r.baseline.rmse : NAN,
                       r.baseline.available ? r.baseline.mean_log_predictive_density : NAN, r.rated,
                       "the validation file"};
    }
    if (!meta.contains("validation") || !meta["validation"].is_object() || !meta["validation"].contains("figures"))
        return std::nullopt;
    const auto& f = meta["validation"]["figures"];
    auto num = [](const nlohmann::json& j, const char* key) {
        return j.is_object() && j.contains(key) && j[key].is_number() ? j[key].get<double>() : NAN;
    };
    const nlohmann::json base = f.contains("baseline") ? f["baseline"] : nlohmann::json::object();
    return HeldOut{num(f, "rmse"), num(f, "mean_log_predictive_density"), num(base, "rmse"),
                   num(base, "mean_log_predictive_density"), f.value("ratings", uint64_t{0}),
                   "the ratings the fit held out"};
}

}  // namespace

std::string fitness_verdict(const ReportInputs& in) {
    if (!in.posterior) throw std::invalid_argument("fitness_verdict: no posterior given");
    const nlohmann::json meta = parse_or_empty(in.posterior->fit_metadata_json);
    const ConvergenceSummary conv = stored_or_recomputed_convergence(*in.posterior);
    if (conv.verdict != "converged")
        return fmt::format("Not fit for use: the chains {} (max R-hat {}, min bulk ESS per chain {}); see the advice "
                           "under Convergence.",
                           conv.verdict == "not_assessable" ? "could not be assessed" : "did not converge",
                           fixed(conv.max_rhat, 3), fixed(conv.min_ess_bulk_per_chain, 0));
    const auto h = held_out_for_verdict(in, meta);
    if (!h)
        return "Converged, accuracy unchecked: no held-out ratings were scored; fit with --holdout or pass "
               "--validation before serving this model.";
    if (!std::isfinite(h->base_rmse) || !std::isfinite(h->base_lpd))
        return fmt::format("Converged; on {} ratings of {} RMSE {} and mean log density {}, with no baseline to "
                           "compare (refit to store one).",
                           h->ratings, h->where, fixed(h->rmse, 4), fixed(h->lpd, 4));
    const bool better = h->rmse < h->base_rmse && h->lpd > h->base_lpd;
    return fmt::format("{}: converged, and on {} ratings of {} it {} the product-mean baseline (RMSE {} against {}, "
                       "mean log density {} against {}).",
                       better ? "Fit for use" : "Not fit for use", h->ratings, h->where,
                       better ? "beats" : "does not beat", fixed(h->rmse, 4), fixed(h->base_rmse, 4),
                       fixed(h->lpd, 4), fixed(h->base_lpd, 4));
}

std::string render_html_report(const ReportInputs& in) {
    if (!in.posterior) throw std::invalid_argument("render_html_report: no posterior given");
    const Posterior& p = *in.posterior;
    const nlohmann::json meta = parse_or_empty(p.fit_metadata_json);
    const ConvergenceSummary conv = stored_or_recomputed_convergence(p);

    std::string html = "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\n";
    html += "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'\">\n";
    html += "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n";
    html += "<title>Credence model report: " + escape_xml(in.model_name) + "</title>\n<style>" + kStyle + "</style></head>\n<body>\n";
    html += fmt::format("<header><h1>Credence model report</h1><div class=\"sub\">{} &middot; rank {} &middot; {} kept "
                        "samples from {} chains</div></header>\n<main>\n",
                        escape_xml(in.model_name), p.rank, p.num_samples, p.num_chains);
    html += provenance(meta, fitness_verdict(in));
    html += overview(in, conv, meta);
    html += stored_held_out(meta);
    html += stored_rank_choice(meta);
    html += convergence_table(conv);
    html += sweep_traces(meta);
    html += probe_traces(in, conv);
    if (in.validation) html += calibration(in);
    html += uncertainty_by_item(in);
    if (in.comparison) html += comparison(*in.comparison);
    html += "</main><footer>Generated by credence report. Self-contained: no scripts, no external resources.</footer>\n"
            "</body></html>\n";
    return html;
}

}  // namespace credence::report
