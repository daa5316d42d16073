// Shares passes over the item samples between concurrent top-N requests.
// Used by server/routes_recommendations.cpp; the engine it calls is
// model/predict/predict.hpp (recommend_batch).
//
// Scoring every item reads the whole item-sample block (S * I * K floats)
// from memory; one pass can score many users at once. Lanes are the
// requesting threads themselves: no background thread, nothing to start or
// stop. A request that finds a lane free leads the next pass; requests that
// arrive while every lane is busy queue and go together in that pass.
//
// Collection window: the route holds a Visit for the whole request (parsing,
// scoring, building the answer). A leader about to start a pass waits, for
// at most `window_us`, while fewer requests are queued than are visiting and
// not already in a pass: those are answers being built or requests being
// parsed, whose clients are about to ask again. So under load one pass
// gathers every waiting client instead of alternating half-full passes,
// and a lone client (the only visit) never waits. A pass that runs while no
// other lane is busy splits its reading, and then its requests' selections
// (exact scores and interval quantiles), between all hardware threads.
#pragma once
#include <chrono>
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
    // server/config.hpp refuses 0 first, so std::invalid_argument here is a
    // bug); window_us: longest wait of a leader for visiting requests to
    // queue (0: never wait).
    explicit TopNBatcher(unsigned lanes = 1, size_t max_batch = 16, uint32_t window_us = 0);

    // Marks one request inside the route from before it asks for its list
    // until its answer is built. Needs the batcher to outlive it; neither
    // copied nor moved.
    class Visit {
    public:
        explicit Visit(TopNBatcher& batcher);
        ~Visit();
        Visit(const Visit&) = delete;
        Visit& operator=(const Visit&) = delete;

    private:
        TopNBatcher& batcher_;
    };

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
        uint64_t windows = 0;      // passes whose leader waited for visiting requests
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
    // Needs mutex_ held and a non-empty queue.
    std::vector<Job*> take_batch();
    // The collection window: waits on `lock` (of mutex_) while fewer jobs
    // are queued than visits outside a pass, up to window_us_.
    void gather(std::unique_lock<std::mutex>& lock);

    const unsigned lanes_;
    const unsigned hardware_threads_;
    const size_t max_batch_;
    const std::chrono::microseconds window_;
    mutable std::mutex mutex_;  // guards everything below
    std::condition_variable finished_;  // a pass ended
    std::condition_variable arrived_;   // a job was queued or a visit ended
    std::deque<Job*> queue_;
    unsigned running_ = 0;   // passes running
    size_t in_passes_ = 0;   // jobs in running passes
    size_t visits_ = 0;      // live Visit objects
    Stats stats_;
};

}  // namespace credence::server
