// Shares passes over the item samples between concurrent top-N requests.
//
// Scoring every item reads the whole item-sample block (S * I * K floats)
// from memory; one pass can score many users at once (model/predict/predict.hpp,
// recommend_batch). A request that finds a lane free runs at once, together
// with whatever is already queued; there is no waiting window, so a lone
// client pays nothing. Requests that arrive while every lane is busy queue
// and go together in the next pass. Lanes are the requesting threads
// themselves: no background thread, nothing to start or stop. A pass that
// runs alone (no other lane busy, nothing queued) splits its reading between
// all hardware threads, so a lone client's request takes less wall time.
#pragma once
#include <condition_variable>
#include <cstddef>
#include <cstdint>
#include <deque>
#include <mutex>
#include <vector>

#include "model/predict/predict.hpp"

namespace credence::server {

class TopNBatcher {
public:
    // lanes: passes that may run at once (0: one per hardware thread);
    // max_batch: requests per pass (>= 1; the config check in
    // server/config.hpp refuses 0 first, so std::invalid_argument here is a bug).
    explicit TopNBatcher(unsigned lanes = 0, size_t max_batch = 16);

    // The same answer as engine.recommend(user, options), or rethrows what it
    // would throw. Needs `engine` alive until this returns. Only requests for
    // the same engine share a pass. Thread-safe; blocks the caller until its
    // answer is ready, and may run other callers' requests meanwhile.
    std::vector<Recommendation> recommend(const PredictionEngine& engine, uint32_t user,
                                          const RecommendOptions& options);

    struct Stats {
        uint64_t requests = 0;     // answered
        uint64_t passes = 0;       // recommend_batch calls
        size_t largest_batch = 0;  // most requests in one pass
    };
    Stats stats() const;

private:
    struct Job {
        const PredictionEngine* engine = nullptr;
        RecommendRequest request;
        RecommendAnswer answer;
        bool done = false;
    };
    // Removes up to max_batch_ queued jobs for the engine of the oldest one.
    std::vector<Job*> take_batch();

    const unsigned lanes_;
    const unsigned hardware_threads_;
    const size_t max_batch_;
    mutable std::mutex mutex_;
    std::condition_variable finished_;
    std::deque<Job*> queue_;
    unsigned running_ = 0;
    Stats stats_;
};

}  // namespace credence::server
