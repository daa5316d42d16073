#include "model/fit/convergence_summary.hpp"

#include <algorithm>
#include <cmath>

#include <Eigen/Dense>
#include <limits>
#include <set>
#include <stdexcept>
#include <string>

#include <fmt/format.h>

#include "model/math/random.hpp"

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

struct ChainRange {
    uint32_t chain;
    uint32_t begin, end;  // sample indices [begin, end)
};

std::vector<ChainRange> chain_ranges(const Posterior& p) {
    std::vector<ChainRange> ranges;
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        if (ranges.empty() || ranges.back().chain != p.sample_chain[s])
            ranges.push_back({p.sample_chain[s], s, s + 1});
        else
            ranges.back().end = s + 1;
    }
    return ranges;
}

// Up to `count` distinct CSR positions, ascending.
std::vector<uint64_t> probe_positions(uint64_t nnz, uint32_t count, uint64_t seed) {
    std::set<uint64_t> chosen;
    if (nnz <= count) {
        for (uint64_t p = 0; p < nnz; ++p) chosen.insert(p);
    } else {
        Rng rng(seed);
        while (chosen.size() < count) chosen.insert(rng.below(nnz));
    }
    return {chosen.begin(), chosen.end()};
}

nlohmann::json finite_or_null(double x) {
    return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr);
}

QuantityConvergence named(std::string quantity, int32_t component = -1, std::string user_id = {},
                          std::string item_id = {}) {
    QuantityConvergence q;
    q.quantity = std::move(quantity);
    q.component = component;
    q.user_id = std::move(user_id);
    q.item_id = std::move(item_id);
    return q;
}

std::string describe(double x) { return std::isnan(x) ? "undefined" : fmt::format("{:.4g}", x); }

}  // namespace

std::string QuantityConvergence::label() const {
    if (quantity == "prediction") return "prediction(probe " + std::to_string(probe) + ")";
    if (component >= 0) return quantity + "[" + std::to_string(component) + "]";
    return quantity;
}

std::string QuantityConvergence::id_label() const {
    if (quantity == "prediction") return "prediction(" + user_id + ", " + item_id + ")";
    return label();
}

namespace {

void check_thresholds(const ConvergenceOptions& options) {
    if (!(options.max_rhat >= 1.0) || !std::isfinite(options.max_rhat))
        throw std::invalid_argument(fmt::format("convergence: R-hat threshold {} must be a finite number >= 1",
                                                options.max_rhat));
    if (!(options.min_ess_per_chain >= 0.0) || !std::isfinite(options.min_ess_per_chain))
        throw std::invalid_argument(fmt::format("convergence: ESS threshold {} must be a finite number >= 0",
                                                options.min_ess_per_chain));
}

// The quantities listed in the header: the last n draws of every chain.
std::vector<MonitoredQuantity> posterior_quantities(const Posterior& posterior, const ConvergenceOptions& options,
                                                    const std::vector<ChainRange>& ranges, uint32_t n) {
    std::vector<MonitoredQuantity> quantities;
    auto gather = [&](QuantityConvergence q, auto value_of_sample) {
        ChainDraws draws(ranges.size(), std::vector<double>(n));
        for (size_t m = 0; m < ranges.size(); ++m)
            for (uint32_t j = 0; j < n; ++j) draws[m][j] = value_of_sample(ranges[m].end - n + j);
        quantities.push_back({std::move(q), std::move(draws)});
    };
    const uint32_t K = posterior.rank;
    using Mat = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
    auto lambda = [&](const std::vector<float>& all, uint32_t s) -> Eigen::MatrixXd {
        return Eigen::Map<const Mat>(all.data() + size_t(s) * K * K, K, K).cast<double>();
    };
    auto mu = [&](const std::vector<float>& all, uint32_t s) -> Eigen::VectorXd {
        return Eigen::Map<const Eigen::VectorXf>(all.data() + size_t(s) * K, K).cast<double>();
    };
    gather(named("noise_precision"), [&](uint32_t s) { return double(posterior.noise_precision[s]); });
    gather(named("mu_interaction"),
           [&](uint32_t s) { return mu_interaction(mu(posterior.user_mu, s), mu(posterior.item_mu, s)); });
    gather(named("factor_cov_product"), [&](uint32_t s) {
        return factor_cov_product(lambda(posterior.user_lambda, s), lambda(posterior.item_lambda, s));
    });
    uint32_t probe = 0;
    for (const ProbePair& pair : probe_pairs(posterior.rated_offsets, posterior.rated_items, options)) {
        QuantityConvergence q = named("prediction", -1, posterior.user_ids[pair.user], posterior.item_ids[pair.item]);
        q.probe = ++probe;
        gather(std::move(q), [&](uint32_t s) { return double(posterior.sample_prediction(s, pair.user, pair.item)); });
    }
    return quantities;
}

// Aggregates over defined figures, warns about the ones that fail the
// thresholds in out.options, and sets the verdict.
void aggregate(ConvergenceSummary& out) {
    const ConvergenceOptions& options = out.options;
    const double chains = out.num_chains;
    std::vector<std::string> undefined, high_rhat, low_ess;
    const QuantityConvergence* worst_rhat = nullptr;
    const QuantityConvergence* worst_ess = nullptr;
    double worst_ess_value = kNaN;
    for (const auto& q : out.quantities) {
        const auto& st = q.stats;
        if (std::isnan(st.rhat) || std::isnan(st.ess_bulk) || std::isnan(st.ess_tail))
            undefined.push_back(q.label());
        if (!std::isnan(st.rhat)) {
            if (std::isnan(out.max_rhat) || st.rhat > out.max_rhat) {
                out.max_rhat = st.rhat;
                worst_rhat = &q;
            }
            if (st.rhat > options.max_rhat) high_rhat.push_back(q.label());
        }
        const double bulk = st.ess_bulk / chains, tail = st.ess_tail / chains;
        if (!std::isnan(bulk) && !(bulk >= out.min_ess_bulk_per_chain)) out.min_ess_bulk_per_chain = bulk;
        if (!std::isnan(tail) && !(tail >= out.min_ess_tail_per_chain)) out.min_ess_tail_per_chain = tail;
        const double low = std::min(std::isnan(bulk) ? INFINITY : bulk, std::isnan(tail) ? INFINITY : tail);
        if (low < options.min_ess_per_chain) {
            low_ess.push_back(q.label());
            if (std::isnan(worst_ess_value) || low < worst_ess_value) {
                worst_ess_value = low;
                worst_ess = &q;
            }
        }
    }
    const size_t total = out.quantities.size();
    if (!undefined.empty())
        out.warnings.push_back(fmt::format(
            "{} of {} quantities have undefined figures (constant or non-finite draws), e.g. {}",
            undefined.size(), total, undefined.front()));
    if (!high_rhat.empty())
        out.warnings.push_back(fmt::format(
            "R-hat above {} for {} of {} quantities (worst {} at {}): the chains disagree",
            options.max_rhat, high_rhat.size(), total, worst_rhat->label(), describe(out.max_rhat)));
    if (!low_ess.empty())
        out.warnings.push_back(fmt::format(
            "ESS below {} per chain for {} of {} quantities (worst {} at {} per chain)",
            options.min_ess_per_chain, low_ess.size(), total, worst_ess->label(), describe(worst_ess_value)));

    if (std::isnan(out.max_rhat))
        out.verdict = "not_assessable";
    else
        out.verdict = high_rhat.empty() && low_ess.empty() ? "converged" : "not_converged";
}

}  // namespace

ConvergenceSummary summarize_convergence(const Posterior& posterior, const ConvergenceOptions& options) {
    check_thresholds(options);
    ConvergenceSummary out;
    out.options = options;
    out.max_rhat = out.min_ess_bulk_per_chain = out.min_ess_tail_per_chain = kNaN;

    // Chains, and the draws each contributes: its last n, n the shortest chain's length.
    const auto ranges = chain_ranges(posterior);
    out.num_chains = static_cast<uint32_t>(ranges.size());
    if (out.num_chains < posterior.num_chains)
        out.warnings.push_back(fmt::format("{} of {} chains kept no samples; they are left out",
                                           posterior.num_chains - out.num_chains, posterior.num_chains));
    uint32_t n = std::numeric_limits<uint32_t>::max();
    for (const auto& r : ranges) n = std::min(n, r.end - r.begin);
    if (ranges.empty()) n = 0;
    out.draws_per_chain = n;
    if (std::any_of(ranges.begin(), ranges.end(), [&](const ChainRange& r) { return r.end - r.begin != n; }))
        out.warnings.push_back(fmt::format(
            "chains kept different numbers of samples; each is assessed on its last {} draws", n));
    if (n < 4) {
        out.verdict = "not_assessable";
        out.warnings.push_back(fmt::format(
            "only {} kept draw(s) per chain; convergence needs at least 4 (keep more samples)", n));
        return out;
    }

    ConvergenceSummary assessed = summarize_draws(posterior_quantities(posterior, options, ranges, n), options);
    assessed.warnings.insert(assessed.warnings.begin(), out.warnings.begin(), out.warnings.end());
    return assessed;
}

std::vector<ProbePair> probe_pairs(const std::vector<uint64_t>& offsets, const std::vector<uint32_t>& items,
                                   const ConvergenceOptions& options) {
    std::vector<ProbePair> pairs;
    if (offsets.empty()) return pairs;
    for (uint64_t pos : probe_positions(offsets.back(), options.max_probe_pairs, options.probe_seed)) {
        const auto user =
            static_cast<uint32_t>(std::upper_bound(offsets.begin(), offsets.end(), pos) - offsets.begin() - 1);
        pairs.push_back({user, items[pos]});
    }
    return pairs;
}

double factor_cov_product(const Eigen::MatrixXd& user_lambda, const Eigen::MatrixXd& item_lambda) {
    Eigen::LLT<Eigen::MatrixXd> cu(user_lambda), cv(item_lambda);
    if (cu.info() != Eigen::Success || cv.info() != Eigen::Success) return kNaN;
    const Eigen::MatrixXd id = Eigen::MatrixXd::Identity(user_lambda.rows(), user_lambda.cols());
    return (cu.solve(id) * cv.solve(id)).trace();
}

double mu_interaction(const Eigen::VectorXd& user_mu, const Eigen::VectorXd& item_mu) { return user_mu.dot(item_mu); }

ConvergenceSummary summarize_draws(std::vector<MonitoredQuantity> quantities, const ConvergenceOptions& options) {
    check_thresholds(options);
    ConvergenceSummary out;
    out.options = options;
    out.max_rhat = out.min_ess_bulk_per_chain = out.min_ess_tail_per_chain = kNaN;
    if (quantities.empty()) {
        out.verdict = "not_assessable";
        out.warnings.push_back("no quantity to assess");
        return out;
    }
    const size_t chains = quantities.front().draws.size();
    const size_t n = chains ? quantities.front().draws.front().size() : 0;
    for (const auto& q : quantities) {
        if (q.draws.size() != chains) throw std::invalid_argument("summarize_draws: quantities with different chain counts");
        for (const auto& c : q.draws)
            if (c.size() != n) throw std::invalid_argument("summarize_draws: chains of different lengths");
    }
    out.num_chains = static_cast<uint32_t>(chains);
    out.draws_per_chain = static_cast<uint32_t>(n);
    if (n < 4 || chains == 0) {
        out.verdict = "not_assessable";
        out.warnings.push_back(fmt::format(
            "only {} draw(s) per chain; convergence needs at least 4 (keep more samples)", n));
        return out;
    }
    for (auto& q : quantities) {
        q.id.stats = convergence(q.draws);
        out.quantities.push_back(std::move(q.id));
    }
    aggregate(out);
    return out;
}

nlohmann::json to_json(const ConvergenceSummary& summary) {
    nlohmann::json quantities = nlohmann::json::array();
    for (const auto& q : summary.quantities) {
        nlohmann::json j = {{"quantity", q.quantity}};
        if (q.component >= 0) j["component"] = q.component;
        if (q.quantity == "prediction") {
            j["user_id"] = q.user_id;
            j["item_id"] = q.item_id;
        }
        j["rhat"] = finite_or_null(q.stats.rhat);
        j["ess_bulk"] = finite_or_null(q.stats.ess_bulk);
        j["ess_tail"] = finite_or_null(q.stats.ess_tail);
        quantities.push_back(std::move(j));
    }
    return {
        {"method", "rank-normalized split R-hat, bulk-ESS and tail-ESS (Vehtari et al. 2021)"},
        {"num_chains", summary.num_chains},
        {"draws_per_chain", summary.draws_per_chain},
        {"assessed", summary.assessed},
        {"first_sweep", summary.first_sweep},
        {"thresholds", {{"max_rhat", summary.options.max_rhat},
                        {"min_ess_per_chain", summary.options.min_ess_per_chain}}},
        {"max_rhat", finite_or_null(summary.max_rhat)},
        {"min_ess_bulk_per_chain", finite_or_null(summary.min_ess_bulk_per_chain)},
        {"min_ess_tail_per_chain", finite_or_null(summary.min_ess_tail_per_chain)},
        {"verdict", summary.verdict},
        {"warnings", summary.warnings},
        {"advice", summary.advice},
        {"quantities", std::move(quantities)},
    };
}

namespace {
double number_or_nan(const nlohmann::json& j, const char* key) {
    return j.contains(key) && j[key].is_number() ? j[key].get<double>() : kNaN;
}
}  // namespace

std::optional<ConvergenceSummary> convergence_from_json(const nlohmann::json& j) {
    if (!j.is_object() || !j.contains("verdict") || !j["verdict"].is_string()) return std::nullopt;
    ConvergenceSummary c;
    c.verdict = j["verdict"].get<std::string>();
    c.num_chains = j.value("num_chains", 0u);
    c.draws_per_chain = j.value("draws_per_chain", 0u);
    c.assessed = j.value("assessed", std::string("kept_samples"));
    c.first_sweep = j.value("first_sweep", 0u);
    c.max_rhat = number_or_nan(j, "max_rhat");
    c.min_ess_bulk_per_chain = number_or_nan(j, "min_ess_bulk_per_chain");
    c.min_ess_tail_per_chain = number_or_nan(j, "min_ess_tail_per_chain");
    if (j.contains("thresholds") && j["thresholds"].is_object()) {
        c.options.max_rhat = j["thresholds"].value("max_rhat", c.options.max_rhat);
        c.options.min_ess_per_chain = j["thresholds"].value("min_ess_per_chain", c.options.min_ess_per_chain);
    }
    for (const char* key : {"warnings", "advice"})
        if (j.contains(key) && j[key].is_array())
            for (const auto& w : j[key])
                if (w.is_string()) (std::string(key) == "warnings" ? c.warnings : c.advice).push_back(w.get<std::string>());
    uint32_t probes = 0;
    if (j.contains("quantities") && j["quantities"].is_array())
        for (const auto& q : j["quantities"]) {
            if (!q.is_object()) continue;
            QuantityConvergence qc;
            qc.quantity = q.value("quantity", std::string());
            qc.component = q.value("component", -1);
            qc.user_id = q.value("user_id", std::string());
            qc.item_id = q.value("item_id", std::string());
            if (qc.quantity == "prediction") qc.probe = ++probes;
            qc.stats = {number_or_nan(q, "rhat"), number_or_nan(q, "ess_bulk"), number_or_nan(q, "ess_tail")};
            c.quantities.push_back(std::move(qc));
        }
    return c;
}

ConvergenceSummary stored_or_recomputed_convergence(const Posterior& posterior) {
    const auto j = nlohmann::json::parse(posterior.diagnostics_json, nullptr, false);
    if (auto stored = convergence_from_json(j); stored && stored->assessed == "every_sweep") return *stored;
    return summarize_convergence(posterior);
}

}  // namespace credence
