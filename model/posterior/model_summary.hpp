// The short, machine-readable summary of a fitted model, shared by
// `credence inspect --json` and GET /v1/model, and the two longer documents
// behind GET /v1/model/trace and /v1/model/diagnostics. Reads only what
// Posterior holds (model/posterior/posterior.hpp); the diagnostics keys are
// those of model/fit/convergence_summary.cpp. Nothing here names a customer.
#pragma once
#include <nlohmann/json.hpp>

#include "model/posterior/posterior.hpp"

namespace credence {

// The summary: data size (customers, products, training ratings, products
// named by the catalogue), rank, biases, scale, chains and kept samples,
// the fit (date, version, seconds, sweeps per chain, seed, data fingerprint),
// the convergence verdict with the 3 worst quantities (highest R-hat first,
// then lowest bulk ESS; probe predictions numbered, never named) and the
// advice on what to change when the run stopped short (an empty list when
// none), the validation figures the fit stored (null when it had none) and the noise
// ({"sampled": true, "sd_posterior_mean": mean over samples of 1/sqrt(tau)}
// or {"sampled": false, "precision": tau, "sd": 1/sqrt(tau)}). Fields the
// file does not record are null. Never throws for a validated posterior
// (free-form documents that do not parse read as empty).
nlohmann::json model_summary(const Posterior& posterior);

// The convergence document as stored, with every probe pair (a customer and
// a product they rated) numbered instead of named, in the quantities and in
// the warnings and advice that quote them. An empty object when the file has none.
nlohmann::json public_diagnostics(const Posterior& posterior);

// The fit's per-sweep traces as stored ({"sweep": [...], "chain": [...],
// "train_rmse": [...], "noise_precision": [...], ...}), an empty object
// when the fit recorded none.
nlohmann::json fit_trace(const Posterior& posterior);

}  // namespace credence
