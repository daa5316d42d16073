// The convergence report of a fitted model: R-hat, bulk-ESS and tail-ESS
// (model/math/convergence_diagnostics.hpp) of a fixed set of scalar quantities, a verdict and
// warnings a user can act on. Its JSON form is what the fit stores in
// Posterior::diagnostics_json.
//
// Quantities assessed (chains are the runs of equal sample_chain values):
//   noise_precision       tau of every kept sample
//   mu_interaction        mu_U . mu_V        } the hyperparameters, through
//   factor_cov_product    tr(Lambda_U^-1     } functions the model identifies
//                            Lambda_V^-1)    } (see summarize_convergence)
//   prediction(u, i)      the sample's mean rating for up to max_probe_pairs
//                         rated (user, item) pairs, chosen without
//                         replacement from the rated-items CSR by an Rng
//                         seeded with probe_seed, reported in CSR order
// Factors and single hyperparameter components are not assessed: they are
// identified only up to an invertible map of the factor space, so their
// R-hat is large even for a well-mixed fit.
//
// Chains of unequal length are compared on their last n draws, n the shortest
// chain's length (later draws are further from the start), with a warning.
// Fewer than 4 draws per chain, or a single kept sample, gives the verdict
// "not_assessable" rather than an exception, so a short fit still saves.
#pragma once
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include <Eigen/Dense>
#include <nlohmann/json.hpp>

#include "model/math/convergence_diagnostics.hpp"
#include "model/posterior/posterior.hpp"

namespace credence {

struct ConvergenceOptions {
    uint32_t max_probe_pairs = 20;
    uint64_t probe_seed = 0x5eed'd1a6ULL;
    // Warn above / below: the thresholds Vehtari et al. (2021) recommend
    // (R-hat below 1.01; bulk- and tail-ESS of at least 100 per chain).
    double max_rhat = 1.01;
    double min_ess_per_chain = 100.0;
};

struct QuantityConvergence {
    std::string quantity;   // "noise_precision", "mu_interaction", "factor_cov_product", "prediction"
    int32_t component = -1; // reserved for per-component quantities; -1 for all current ones
    std::string user_id;    // for prediction, else empty
    std::string item_id;    // for prediction, else empty
    uint32_t probe = 0;     // for prediction: its number among the probe pairs, from 1; else 0
    ConvergenceStats stats;
    // For progress lines, warnings and logs: names no customer or product
    // ("noise_precision", "prediction(probe 3)"); ratings are personal data.
    std::string label() const;
    // With the pair's ids ("prediction(cust-7, item-19)"): only to find and
    // replace that text in warnings stored by files written before labels
    // dropped the ids.
    std::string id_label() const;
};

struct ConvergenceSummary {
    uint32_t num_chains = 0;       // chains with kept samples
    uint32_t draws_per_chain = 0;  // draws of each chain used
    // Which draws were assessed: "kept_samples" (the posterior's kept draws)
    // or "every_sweep" (the sampler's record of every sweep in the window
    // [first_sweep, first_sweep + draws_per_chain) of each chain).
    std::string assessed = "kept_samples";
    uint32_t first_sweep = 0;
    std::vector<QuantityConvergence> quantities;
    // Over quantities whose figure is defined; NaN when none is.
    double max_rhat = 0.0;
    double min_ess_bulk_per_chain = 0.0;
    double min_ess_tail_per_chain = 0.0;
    std::string verdict;  // "converged", "not_converged" or "not_assessable"
    std::vector<std::string> warnings;  // what failed, with the worst quantity and figure
    std::vector<std::string> advice;    // what to do about it (added by the caller that ran the fit)
    ConvergenceOptions options;
};

// ---- the pieces the sampler's own monitor (model/fit/convergence_monitor.hpp)
// shares with summarize_convergence, so both assess the same quantities.

// One rated (user, item) pair whose prediction is monitored.
struct ProbePair {
    uint32_t user = 0;
    uint32_t item = 0;
};

// Up to options.max_probe_pairs distinct pairs of the rated-items CSR
// (offsets [U+1], items [nnz]), chosen without replacement by an Rng seeded
// with options.probe_seed, in CSR order. Needs a well-formed CSR.
std::vector<ProbePair> probe_pairs(const std::vector<uint64_t>& offsets, const std::vector<uint32_t>& items,
                                   const ConvergenceOptions& options);

// trace(Lambda_U^-1 Lambda_V^-1), the factor_cov_product; NaN when either
// precision is not positive definite.
double factor_cov_product(const Eigen::MatrixXd& user_lambda, const Eigen::MatrixXd& item_lambda);

// mu_U . mu_V, the mu_interaction.
double mu_interaction(const Eigen::VectorXd& user_mu, const Eigen::VectorXd& item_mu);

// A quantity to assess and its draws, draws[chain][iteration].
struct MonitoredQuantity {
    QuantityConvergence id;  // quantity name and labels; stats are filled by summarize_draws
    ChainDraws draws;
};

// Assesses each quantity (every one with the same number of chains and
// draws, at least 4 per chain; fewer gives the verdict "not_assessable"
// with a warning), aggregates, warns about the ones that fail the thresholds
// and sets the verdict. Throws std::invalid_argument for thresholds out of
// range or draws of different shapes (bugs in the caller).
ConvergenceSummary summarize_draws(std::vector<MonitoredQuantity> quantities, const ConvergenceOptions& options);

// Needs a posterior that passes Posterior::validate() and thresholds in
// range (max_rhat finite and >= 1, min_ess_per_chain finite and >= 0;
// max_probe_pairs may be 0). Throws std::invalid_argument for a threshold out
// of range: no user input reaches them (fit and report use the defaults).
ConvergenceSummary summarize_convergence(const Posterior& posterior, const ConvergenceOptions& options = {});

// snake_case JSON; undefined (NaN) and infinite figures are written as null
// and explained in "warnings".
nlohmann::json to_json(const ConvergenceSummary& summary);

// Reads what to_json wrote (null figures come back as NaN; keys a file from
// an older version lacks keep their defaults). nullopt when `j` is not such
// an object (for example "{}" from a fit that stored no figures).
std::optional<ConvergenceSummary> convergence_from_json(const nlohmann::json& j);

// The figures a fit stored in the posterior (Posterior::diagnostics_json)
// when they come from the sampler's every-sweep record, else those of the
// kept draws (summarize_convergence), as for files written before the
// sampler kept that record.
ConvergenceSummary stored_or_recomputed_convergence(const Posterior& posterior);

}  // namespace credence
