#include "model/fit/convergence_monitor.hpp"

#include <stdexcept>

namespace credence {

ConvergenceMonitor::ConvergenceMonitor(const CsrMatrix& by_user, const IdMap& users, const IdMap& items,
                                       double global_mean, uint32_t chains, const ConvergenceOptions& options)
    : users_(users), items_(items), global_mean_(global_mean), options_(options), values_(chains) {
    probes_ = probe_pairs(by_user.offsets, by_user.index, options);
    for (const char* name : {"noise_precision", "mu_interaction", "factor_cov_product"}) {
        QuantityConvergence q;
        q.quantity = name;
        labels_.push_back(q);
    }
    for (const ProbePair& p : probes_) {
        QuantityConvergence q;
        q.quantity = "prediction";
        q.user_id = users_.name(p.user);
        q.item_id = items_.name(p.item);
        q.probe = static_cast<uint32_t>(labels_.size() - 2);  // after the 3 hyperparameter quantities: 1, 2, ...
        labels_.push_back(q);
    }
}

void ConvergenceMonitor::record(uint32_t chain, uint32_t sweep, const GibbsState& st) {
    std::vector<double>& v = values_.at(chain);
    const size_t Q = labels_.size();
    if (sweep < first_sweep_) return;  // before the window anyone will assess
    if (v.size() != size_t(sweep - first_sweep_) * Q)
        throw std::logic_error("ConvergenceMonitor::record: sweeps of a chain must be recorded in order");
    v.push_back(st.noise_precision);
    v.push_back(mu_interaction(st.user_mu, st.item_mu));
    v.push_back(factor_cov_product(st.user_lambda, st.item_lambda));
    const uint32_t K = st.rank;
    for (const ProbePair& p : probes_) {
        // The state's float32 values, as Posterior::sample_prediction reads them.
        double m = global_mean_;
        if (st.biases) m += double(st.user_bias[p.user]) + double(st.item_bias[p.item]);
        for (uint32_t k = 0; k < K; ++k)
            m += double(st.user_factors[size_t(p.user) * K + k]) * double(st.item_factors[size_t(p.item) * K + k]);
        v.push_back(m);
    }
}

void ConvergenceMonitor::drop_before(uint32_t sweep) {
    if (sweep <= first_sweep_) return;
    const size_t Q = labels_.size();
    for (auto& v : values_) {
        const size_t drop = std::min(v.size(), size_t(sweep - first_sweep_) * Q);
        v.erase(v.begin(), v.begin() + static_cast<std::ptrdiff_t>(drop));
    }
    first_sweep_ = sweep;
}

ConvergenceSummary ConvergenceMonitor::assess(uint32_t begin, uint32_t end) const {
    const size_t Q = labels_.size();
    if (begin < first_sweep_ || end < begin)
        throw std::logic_error("ConvergenceMonitor::assess: the window starts before the recorded sweeps");
    for (const auto& v : values_)
        if (v.size() < size_t(end - first_sweep_) * Q)
            throw std::logic_error("ConvergenceMonitor::assess: a chain has not been recorded through the window");
    std::vector<MonitoredQuantity> quantities;
    quantities.reserve(Q);
    for (size_t q = 0; q < Q; ++q) {
        ChainDraws draws(values_.size(), std::vector<double>(end - begin));
        for (size_t c = 0; c < values_.size(); ++c)
            for (uint32_t j = begin; j < end; ++j) draws[c][j - begin] = values_[c][size_t(j - first_sweep_) * Q + q];
        quantities.push_back({labels_[q], std::move(draws)});
    }
    ConvergenceSummary out = summarize_draws(std::move(quantities), options_);
    out.assessed = "every_sweep";
    out.first_sweep = begin;
    return out;
}

}  // namespace credence
