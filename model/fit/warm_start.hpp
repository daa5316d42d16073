// Warm starts: the chains of a new fit begin where an earlier fit of the same
// model on an earlier export ended. Used by `credence fit --warm-start` and by
// `--refit-on-all` (cli/fit_command.cpp) through fit_bpmf's `start` argument
// (model/fit/sampler.hpp). The sampler's model and run-length rules are
// those of model/fit/sampler.hpp.
//
// Chain c of the new fit starts from one kept draw of the old posterior:
// old chain c mod C (C old chains), its last kept draw (the one before it for
// the second new chain on the same old chain, and so on), so every new chain
// starts from a different draw. Customers and products in both keep their
// old factors and biases; new ones start from a draw of the prior given that
// draw's hyperparameters (factor ~ Normal(mu, Lambda^-1), bias ~ Normal(0,
// 1/lambda)), from streams keyed (seed, chain, 0, init, row) like a cold
// start, so the start does not depend on the thread count; ids the new
// export no longer has are dropped. With biases, the change of the training
// mean g is moved into the item biases, so every old prediction is unchanged
// at the start. The hyperparameters, bias precisions and noise precision
// are the draw's.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/data/ratings.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/posterior/posterior.hpp"

namespace credence {

// What fit_bpmf needs to start from given states instead of random ones.
struct WarmStart {
    std::vector<GibbsState> states;  // one per chain of the new fit, shaped for its training set
    // Sweeps a converged run discards per chain: min(n/4, burn_in) at a
    // checkpoint of n sweeps instead of n/4 (model/fit/sampler.cpp says why).
    uint32_t burn_in = 0;
    nlohmann::json record;           // stored in the fit metadata under "start"
};

// Sweeps a warm-started converged run discards (see burn_in above): a few
// autocorrelation times of the slowest monitored quantity on the data sets
// measured (scripts/bench-warm-start), far below a cold run's quarter.
inline constexpr uint32_t kWarmStartBurnIn = 100;

// Builds the starting states of `options.chains` chains for a fit of `train`
// from `old`. `old_name` names the old file in messages and the record.
// Refuses, naming the reason and what to do:
//   OptionError  the rank, the bias setting, the noise setting (sampled or
//                fixed, and its value) or a prior constant differs from the
//                old fit's (the old draws are of another model);
//   DataError    the rating scale differs (declared or observed: the old
//                factors are in other units; declare the same --scale), or
//                fewer than half of the training ratings have a customer and
//                a product the old model knows (the start would be mostly
//                prior draws: fit without --warm-start).
// An old fit whose verdict was not "converged" gives states all the same
// but burn_in = UINT32_MAX (a cold start's quarter), noted in the record.
// Throws NumericError when an old draw's precision is not positive definite
// (a corrupt file that passed its checksums: refit cold). Needs `old` to
// pass Posterior::validate() and `options` to be valid for fit_bpmf.
WarmStart warm_start_from(const Posterior& old, const std::string& old_name, const RatingSet& train,
                          const FitOptions& options);

}  // namespace credence
