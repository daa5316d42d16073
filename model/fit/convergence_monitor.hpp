// The sampler's running convergence record: after every sweep of every chain
// it notes the quantities the convergence check assesses (the ones of
// model/fit/convergence_summary.hpp: noise precision, mu_interaction,
// factor_cov_product and the probe predictions), so fit_bpmf can judge a
// window of sweeps at full resolution and decide whether to go on. Used by
// model/fit/sampler.cpp only.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include "model/data/ratings.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/fit/gibbs_sweep.hpp"

namespace credence {

class ConvergenceMonitor {
public:
    // `by_user` is the training CSR (the rated pairs the probes are drawn
    // from, as summarize_convergence draws them from the posterior);
    // `users`, `items` label the probes. Borrowed: all must outlive the monitor.
    ConvergenceMonitor(const CsrMatrix& by_user, const IdMap& users, const IdMap& items, double global_mean,
                       uint32_t chains, const ConvergenceOptions& options);

    // Records sweep `sweep` of `chain`; sweeps before the first one kept (see
    // drop_before) are ignored, the others must come in order without gaps
    // (std::logic_error otherwise). Safe to call from
    // several threads at once for different chains; never for one chain.
    void record(uint32_t chain, uint32_t sweep, const GibbsState& state);

    // Forgets every recorded sweep before `sweep` (all chains).
    void drop_before(uint32_t sweep);

    // Assesses sweeps [begin, end) of every chain. Needs every chain recorded
    // through end - 1 and nothing in the window dropped; throws
    // std::logic_error otherwise.
    ConvergenceSummary assess(uint32_t begin, uint32_t end) const;

    size_t quantity_count() const { return labels_.size(); }

private:
    const IdMap& users_;
    const IdMap& items_;
    double global_mean_;
    ConvergenceOptions options_;
    std::vector<ProbePair> probes_;
    std::vector<QuantityConvergence> labels_;     // one per quantity, in recording order
    uint32_t first_sweep_ = 0;                    // sweeps before this are dropped
    std::vector<std::vector<double>> values_;     // [chain][(sweep - first_sweep_) * Q + q]
};

}  // namespace credence
