// The model being served and the slot that swaps it.
//
// A LoadedModel is everything one model needs to answer requests: the
// posterior, its prediction engine, id maps and per-item statistics computed
// once at load (model/predict/item_statistics.hpp). It is immutable; each
// request takes one shared_ptr snapshot from the ModelSlot, so every answer
// comes whole from one model even while a reload swaps in another. Used by
// every route file and by `credence serve`.
#pragma once
#include <atomic>
#include <chrono>
#include <cstdint>
#include <memory>
#include <mutex>
#include <string>
#include <vector>

#include "model/data/ratings.hpp"
#include "model/posterior/posterior.hpp"
#include "model/predict/item_statistics.hpp"
#include "model/predict/predict.hpp"

namespace credence::server {

struct LoadedModel {
    // The engine keeps the half-precision screening copy (EngineOptions):
    // serving answers many top-N requests from one model.
    explicit LoadedModel(std::shared_ptr<const Posterior> p)
        : posterior(p), engine(p, EngineOptions{.half_precision_screening = true}) {}

    std::shared_ptr<const Posterior> posterior;
    PredictionEngine engine;
    IdMap users;
    IdMap items;
    std::string fingerprint;   // 16 hex digits, XXH3-64 over the posterior's contents
    std::string source_path;   // file it came from ("" when built in memory)
    double load_ms = 0.0;      // read + validate + precompute
    int64_t loaded_at_unix_s = 0;

    // Per-item statistics, orderings and hyperparameter covariances of the
    // posterior (item routes, population answers).
    ItemStatistics statistics;

    uint32_t rank() const { return posterior->rank; }
    uint32_t num_samples() const { return posterior->num_samples; }
};

// Builds a LoadedModel from a validated posterior; `source_path` is recorded
// as given. Throws NumericError (a credence::Error) if a hyperparameter
// precision matrix is not positive definite (the model cannot serve
// population answers).
std::shared_ptr<const LoadedModel> build_loaded_model(std::shared_ptr<const Posterior> posterior,
                                                      std::string source_path);

// Reads, validates and prepares a posterior file. Throws FormatError /
// Error with the reason; never returns a half-built model.
std::shared_ptr<const LoadedModel> load_model_file(const std::string& path);

// The XXH3-64 fingerprint of a posterior's contents as 16 hex digits: two
// posteriors with the same samples, ids and metadata share it.
std::string posterior_fingerprint(const Posterior& posterior);

// Holds the current model. get() and set() are safe from any thread.
class ModelSlot {
public:
    std::shared_ptr<const LoadedModel> get() const {
        std::lock_guard lock(mutex_);
        return model_;
    }
    // Swaps in `next`; returns the model it replaced (maybe null).
    std::shared_ptr<const LoadedModel> set(std::shared_ptr<const LoadedModel> next) {
        std::lock_guard lock(mutex_);
        model_.swap(next);
        return next;
    }

private:
    // A mutex-guarded pointer copy costs tens of nanoseconds, invisible next to
    // scoring, and avoids relying on std::atomic<shared_ptr> support.
    mutable std::mutex mutex_;
    std::shared_ptr<const LoadedModel> model_;
};

}  // namespace credence::server
