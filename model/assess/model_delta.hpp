// What changed between two fitted models (usually last night's and
// tonight's): which customers and products came and went, which products'
// predictions moved most, how each fit ran, and, given held-out ratings, the
// change in accuracy (model/assess/release_gate.hpp's paired comparison).
// Behind `credence delta` (cli/delta_command.cpp).
//
// A product's predicted mean and its uncertainty are identified quantities
// (unlike single factors, which are only identified up to a map of the
// factor space): for kept sample s, a_s(i) = g + mean_u b_u,s + c_i,s +
// (mean_u U_u,s) . V_i,s, the sample's mean prediction for product i over
// the model's customers; the product's mean is the average of a_s(i) over
// samples and its uncertainty the sd of a_s(i) over samples (rating units).
// Customer ids are personal data: they are counted, and listed only when
// asked for.
#pragma once
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/assess/release_gate.hpp"
#include "model/posterior/posterior.hpp"

namespace credence {

// How a fit ran, from its stored metadata and diagnostics (empty or NaN
// where the file recorded nothing).
struct FitFacts {
    std::string created_at, credence_version, data_fingerprint, verdict, start;
    uint64_t training_ratings = 0;
    uint32_t sweeps_per_chain = 0, burn_in = 0;
    double sampling_s = 0.0;
};
FitFacts fit_facts(const Posterior& posterior);

struct IdChanges {
    uint64_t before = 0, after = 0, kept = 0, added = 0, dropped = 0;
    std::vector<std::string> added_ids, dropped_ids;  // products always; customers only when listed
};

struct ProductShift {
    std::string product;
    double mean_before = 0.0, mean_after = 0.0;  // rating units
    double sd_before = 0.0, sd_after = 0.0;      // rating units
};

struct ModelDelta {
    FitFacts before_fit, after_fit;
    IdChanges customers, products;
    std::vector<ProductShift> mean_moves;  // the `top` largest |mean_after - mean_before|, largest first
    std::vector<ProductShift> sd_moves;    // the `top` largest |sd_after - sd_before|, largest first
    std::optional<PairedAccuracy> accuracy;
};

struct DeltaOptions {
    uint32_t top = 10;                 // products listed per kind of move
    bool list_customer_ids = false;    // personal data: off unless asked
};

// Needs posteriors that pass Posterior::validate(). `validation` (may be
// null) gives the accuracy part. Ties in the move lists break by product id.
ModelDelta model_delta(const Posterior& before, const Posterior& after, const DeltaOptions& options,
                       const RatingSet* validation = nullptr);

// snake_case JSON: before/after {fit}, customers, products (with ids),
// mean_moves, sd_moves, accuracy (null without validation).
nlohmann::json to_json(const ModelDelta& delta);

// The same as readable text, a few lines per part.
std::string format_text(const ModelDelta& delta);

}  // namespace credence
