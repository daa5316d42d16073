// TopNBatcher (server/topn_batcher.hpp).
#include "server/topn_batcher.hpp"

#include <algorithm>
#include <stdexcept>
#include <thread>

namespace credence::server {

TopNBatcher::TopNBatcher(unsigned lanes, size_t max_batch, uint32_t window_us)
    : lanes_(lanes ? lanes : std::max(1u, std::thread::hardware_concurrency())),
      hardware_threads_(std::max(1u, std::thread::hardware_concurrency())),
      max_batch_(max_batch),
      window_(window_us) {
    if (max_batch_ == 0) throw std::invalid_argument("top-N batcher needs a batch size of at least 1");
}

TopNBatcher::Visit::Visit(TopNBatcher& batcher) : batcher_(batcher) {
    std::lock_guard lock(batcher_.mutex_);
    ++batcher_.visits_;
}

TopNBatcher::Visit::~Visit() {
    std::lock_guard lock(batcher_.mutex_);
    --batcher_.visits_;
    batcher_.arrived_.notify_all();  // a leader may be waiting for this one
}

std::vector<TopNBatcher::Job*> TopNBatcher::take_batch() {
    std::vector<Job*> batch;
    const PredictionEngine* engine = queue_.front()->engine;
    for (auto it = queue_.begin(); it != queue_.end() && batch.size() < max_batch_;) {
        if ((*it)->engine == engine) {
            batch.push_back(*it);
            it = queue_.erase(it);
        } else {
            ++it;
        }
    }
    return batch;
}

void TopNBatcher::gather(std::unique_lock<std::mutex>& lock) {
    // Visits outside a pass that have not queued yet: about to.
    auto more_coming = [&] {
        return queue_.size() < max_batch_ && visits_ > in_passes_ && queue_.size() < visits_ - in_passes_;
    };
    if (window_.count() == 0 || !more_coming()) return;
    const auto deadline = std::chrono::steady_clock::now() + window_;
    ++stats_.windows;
    while (more_coming())
        if (arrived_.wait_until(lock, deadline) == std::cv_status::timeout) break;
}

std::vector<Recommendation> TopNBatcher::recommend(const PredictionEngine& engine, uint32_t user,
                                                   const RecommendOptions& options) {
    Job job;
    job.engine = &engine;
    job.request = {user, options};
    std::unique_lock lock(mutex_);
    queue_.push_back(&job);
    arrived_.notify_all();
    while (!job.done) {
        if (running_ >= lanes_ || queue_.empty()) {
            // Our job is queued behind a busy lane, or taken by another lane.
            finished_.wait(lock);
            continue;
        }
        ++running_;
        gather(lock);
        if (queue_.empty()) {  // another lane took everything while we waited
            --running_;
            finished_.notify_all();
            continue;
        }
        std::vector<Job*> batch = take_batch();
        in_passes_ += batch.size();
        // A pass with no other lane busy reads the samples on every core.
        // (With several lanes, only when nothing is left queued for another.)
        const bool alone = running_ == 1 && (lanes_ == 1 || queue_.empty());
        const int threads = alone ? static_cast<int>(hardware_threads_) : 1;
        lock.unlock();
        std::vector<RecommendRequest> requests;
        requests.reserve(batch.size());
        for (const Job* j : batch) requests.push_back(j->request);
        try {
            auto answers = batch.front()->engine->recommend_batch(requests, threads);
            for (size_t k = 0; k < batch.size(); ++k) batch[k]->answer = std::move(answers[k]);
        } catch (...) {
            for (Job* j : batch) j->answer.error = std::current_exception();
        }
        lock.lock();
        for (Job* j : batch) j->done = true;
        --running_;
        in_passes_ -= batch.size();
        stats_.requests += batch.size();
        stats_.passes += 1;
        stats_.largest_batch = std::max(stats_.largest_batch, batch.size());
        finished_.notify_all();
    }
    lock.unlock();
    if (job.answer.error) std::rethrow_exception(job.answer.error);
    return std::move(job.answer.items);
}

TopNBatcher::Stats TopNBatcher::stats() const {
    std::lock_guard lock(mutex_);
    return stats_;
}

}  // namespace credence::server
