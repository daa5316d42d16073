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
    if (quantity == "prediction") return "prediction(" + user_id + ", " + item_id + ")";
    if (component >= 0) return quantity + "[" + std::to_string(component) + "]";
    return quantity;
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

// The quantities listed in the header, each assessed on the last n draws of
// every chain.
std::vector<QuantityConvergence> assess_quantities(const Posterior& posterior, const ConvergenceOptions& options,
                                                   const std::vector<ChainRange>& ranges, uint32_t n) {
    std::vector<QuantityConvergence> quantities;
    // Gathers one quantity's draws (last n of each chain) and assesses it.
    auto assess = [&](QuantityConvergence q, auto value_of_sample) {
        ChainDraws draws(ranges.size(), std::vector<double>(n));
        for (size_t m = 0; m < ranges.size(); ++m)
            for (uint32_t j = 0; j < n; ++j) draws[m][j] = value_of_sample(ranges[m].end - n + j);
        q.stats = convergence(draws);
        quantities.push_back(std::move(q));
    };

    const uint32_t K = posterior.rank;
    assess(named("noise_precision"), [&](uint32_t s) { return double(posterior.noise_precision[s]); });
    // The likelihood is unchanged when every user factor is mapped by an
    // invertible R and every item factor by R^-T, so single components of
    // mu, or their norms, drift between chains even when every prediction
    // has mixed. Assess functions that this map leaves unchanged:
    //   mu_interaction    = mu_U . mu_V
    //   factor_cov_product = trace(Lambda_U^-1 Lambda_V^-1)
    auto dot_mu = [&](uint32_t s) {
        double d = 0.0;
        for (uint32_t k = 0; k < K; ++k)
            d += double(posterior.user_mu[size_t(s) * K + k]) * double(posterior.item_mu[size_t(s) * K + k]);
        return d;
    };
    auto cov_product = [&](uint32_t s) {
        using Mat = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
        const Eigen::MatrixXd lu = Eigen::Map<const Mat>(posterior.user_lambda.data() + size_t(s) * K * K, K, K).cast<double>();
        const Eigen::MatrixXd lv = Eigen::Map<const Mat>(posterior.item_lambda.data() + size_t(s) * K * K, K, K).cast<double>();
        Eigen::LLT<Eigen::MatrixXd> cu(lu), cv(lv);
        if (cu.info() != Eigen::Success || cv.info() != Eigen::Success) return kNaN;
        const Eigen::MatrixXd id = Eigen::MatrixXd::Identity(K, K);
        return (cu.solve(id) * cv.solve(id)).trace();
    };
    assess(named("mu_interaction"), dot_mu);
    assess(named("factor_cov_product"), cov_product);
    const auto& offsets = posterior.rated_offsets;
    for (uint64_t pos : probe_positions(offsets.back(), options.max_probe_pairs, options.probe_seed)) {
        const auto user = static_cast<uint32_t>(std::upper_bound(offsets.begin(), offsets.end(), pos) -
                                                offsets.begin() - 1);
        const uint32_t item = posterior.rated_items[pos];
        assess(named("prediction", -1, posterior.user_ids[user], posterior.item_ids[item]),
               [&](uint32_t s) { return double(posterior.sample_prediction(s, user, item)); });
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
            "R-hat above {} for {} of {} quantities (worst {} at {}); the chains disagree: "
            "run more sweeps or a longer burn-in",
            options.max_rhat, high_rhat.size(), total, worst_rhat->label(), describe(out.max_rhat)));
    if (!low_ess.empty())
        out.warnings.push_back(fmt::format(
            "ESS below {} per chain for {} of {} quantities (worst {} at {} per chain); "
            "keep more samples or thin less",
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

    out.quantities = assess_quantities(posterior, options, ranges, n);
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
        {"thresholds", {{"max_rhat", summary.options.max_rhat},
                        {"min_ess_per_chain", summary.options.min_ess_per_chain}}},
        {"max_rhat", finite_or_null(summary.max_rhat)},
        {"min_ess_bulk_per_chain", finite_or_null(summary.min_ess_bulk_per_chain)},
        {"min_ess_tail_per_chain", finite_or_null(summary.min_ess_tail_per_chain)},
        {"verdict", summary.verdict},
        {"warnings", summary.warnings},
        {"quantities", std::move(quantities)},
    };
}

}  // namespace credence
