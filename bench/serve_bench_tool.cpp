// Helper for scripts/bench-serve (not part of the product):
//   serve_bench_tool model OUT [items rank samples users]  writes a synthetic posterior
//   serve_bench_tool topn MODEL [requests [batches]]       in-process top-10 timings: one request alone
//                                                          (p50, p99 ms) and batches of 8 and 16 (ms per
//                                                          pass); "batches": batches of 16 only
//   serve_bench_tool screen MODEL [passes]                 the shared screening pass alone (CPU ms per
//                                                          pass, one thread) for 1, 2, 4, 8 and 16 viewers
//   serve_bench_tool serve CONFIG                          runs the server (when `credence serve` is absent)
#include <omp.h>
#include <time.h>

#include <algorithm>
#include <chrono>
#include <cstdio>
#include <memory>
#include <cstdlib>
#include <iostream>
#include <string>
#include <vector>

#include "model/math/cpu_level.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"
#include "model/predict/screening.hpp"
#include "tests/support/simulate.hpp"
#include "server/server.hpp"

namespace {

double thread_cpu_ms() {
    timespec ts{};
    clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts);
    return 1e3 * double(ts.tv_sec) + 1e-6 * double(ts.tv_nsec);
}

double percentile(std::vector<double> v, double q) {
    std::sort(v.begin(), v.end());
    return v[std::min(v.size() - 1, static_cast<size_t>(q * double(v.size())))];
}

// In-process top-10 by mean: the engine alone, without HTTP.
int topn(const std::string& path, int requests, bool batch_only) {
    auto posterior = std::make_shared<const credence::Posterior>(credence::read_posterior(path));
    const credence::PredictionEngine engine(posterior);
    const uint32_t users = posterior->num_users;
    credence::RecommendOptions options;
    options.n = 10;
    std::vector<double> alone_ms;
    const double cpu0 = thread_cpu_ms();
    for (int r = 0; r < (batch_only ? 1 : requests); ++r) {
        const auto start = std::chrono::steady_clock::now();
        const auto items = engine.recommend(static_cast<uint32_t>(r) % users, options);
        alone_ms.push_back(std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count());
        if (items.size() != 10) std::printf("?");
    }
    const double cpu_per_request = (thread_cpu_ms() - cpu0) / (batch_only ? 1 : requests);
    std::printf("kernels %s; one request alone: p50 %.3f ms, p99 %.3f ms, %.3f ms CPU (%d requests)\n",
                credence::cpu_level_description().c_str(), percentile(alone_ms, 0.5), percentile(alone_ms, 0.99),
                cpu_per_request, requests);
    if (!batch_only) {
        // The server's lone pass: the reading split between every core.
        const int cores = omp_get_num_procs();
        std::vector<double> spread_ms;
        for (int r = 0; r < requests; ++r) {
            const std::vector<credence::RecommendRequest> one{{static_cast<uint32_t>(r) % users, options}};
            const auto start = std::chrono::steady_clock::now();
            const auto answers = engine.recommend_batch(one, cores);
            spread_ms.push_back(std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count());
            if (answers[0].items.size() != 10) std::printf("?");
        }
        std::printf("one request alone on %d cores: p50 %.3f ms, p99 %.3f ms\n", cores, percentile(spread_ms, 0.5),
                    percentile(spread_ms, 0.99));
    }
    for (size_t batch : {size_t(8), size_t(16)}) {
        if (batch_only && batch != 16) continue;
        std::vector<double> pass_ms;
        const double batch_cpu0 = thread_cpu_ms();
        int passes = 0;
        for (int r = 0; r < std::max(4, requests / int(batch)); ++r) {
            std::vector<credence::RecommendRequest> many(batch);
            for (size_t b = 0; b < batch; ++b) many[b] = {static_cast<uint32_t>(r * batch + b) % users, options};
            const auto start = std::chrono::steady_clock::now();
            const auto answers = engine.recommend_batch(many);
            pass_ms.push_back(std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count());
            if (answers.size() != batch) std::printf("?");
            ++passes;
        }
        std::printf("batch of %zu: p50 %.3f ms per pass (%.3f ms per request), %.3f ms CPU per pass\n", batch,
                    percentile(pass_ms, 0.5), percentile(pass_ms, 0.5) / double(batch),
                    (thread_cpu_ms() - batch_cpu0) / passes);
    }
    return 0;
}

// The shared screening pass by itself: how its CPU cost grows with the
// viewers sharing it (the rest of a request is selection and the answer).
int screen(const std::string& path, int passes) {
    const auto posterior = credence::read_posterior(path);
    const std::vector<double> norms = credence::max_item_norms(posterior);
    const credence::ItemBiasTotals totals = credence::item_bias_totals(posterior);
    const credence::HalfItemBlocks half = credence::half_item_blocks(posterior);
    std::printf("kernels %s\n", credence::cpu_level_description().c_str());
    for (const bool use_half : {false, true}) {
        if (use_half && !half.usable()) {
            std::printf("half copy: not usable (a factor beyond half's range)\n");
            break;
        }
        std::printf("%s\n", use_half ? "reading the half copy (what the engine does for mean rankings):"
                                      : "reading the float factors:");
        for (size_t viewers : {size_t(1), size_t(2), size_t(4), size_t(8), size_t(16)}) {
            std::vector<credence::ScreenJob> jobs(viewers);
            std::vector<credence::ScreenJob*> pointers;
            for (size_t v = 0; v < viewers; ++v) {
                jobs[v].viewer = credence::known_user(posterior, static_cast<uint32_t>(v % posterior.num_users));
                pointers.push_back(&jobs[v]);
            }
            const credence::HalfItemBlocks* h = use_half ? &half : nullptr;
            credence::screen_all_items(posterior, norms, pointers, 1, &totals, h);  // warm
            std::vector<double> cpu_ms;
            for (int r = 0; r < passes; ++r) {
                const double cpu0 = thread_cpu_ms();
                credence::screen_all_items(posterior, norms, pointers, 1, &totals, h);
                cpu_ms.push_back(thread_cpu_ms() - cpu0);
            }
            std::printf("%2zu viewers: p50 %.3f ms CPU per pass (%.3f per viewer), min %.3f; slack %.3g\n", viewers,
                        percentile(cpu_ms, 0.5), percentile(cpu_ms, 0.5) / double(viewers),
                        percentile(cpu_ms, 0.0), jobs[0].slack);
        }
    }
    return 0;
}

}  // namespace

int main(int argc, char** argv) {
    const std::string cmd = argc > 1 ? argv[1] : "";
    try {
        if (cmd == "model" && argc >= 3) {
            credence::SimulatedPosteriorOptions spec;
            spec.items = argc > 3 ? std::stoul(argv[3]) : 10000;
            spec.rank = argc > 4 ? std::stoul(argv[4]) : 16;
            spec.samples = argc > 5 ? std::stoul(argv[5]) : 100;
            spec.users = argc > 6 ? std::stoul(argv[6]) : 1000;
            spec.chains = 4;
            spec.rated_fraction = 0.002;
            spec.id_digits = 5;  // scripts/bench-serve asks for "cust-%05d" and "sku-%05d"
            // The spread the published serving figures were measured with (top-N
            // screening work depends on how far item scores stand apart).
            spec.factor_sd = 0.5;
            spec.jitter_sd = 0.15;
            spec.global_mean = 3.6f;
            const auto bytes = credence::write_posterior(credence::simulate_posterior(spec), argv[2]);
            std::printf("wrote %s: %u items, rank %u, %u samples, %u users, %llu bytes\n", argv[2], spec.items,
                        spec.rank, spec.samples, spec.users, static_cast<unsigned long long>(bytes));
            return 0;
        }
        if (cmd == "topn" && argc >= 3)
            return topn(argv[2], argc > 3 ? std::stoi(argv[3]) : 200, argc > 4 && std::string(argv[4]) == "batches");
        if (cmd == "screen" && argc >= 3) return screen(argv[2], argc > 3 ? std::stoi(argv[3]) : 40);
        if (cmd == "serve" && argc >= 3)
            return credence::server::run_server(credence::server::load_serve_config(argv[2]));
    } catch (const std::exception& e) {
        std::cerr << "serve_bench_tool: " << e.what() << "\n";
        return 1;
    }
    std::cerr << "usage: serve_bench_tool model OUT [items rank samples users] | "
                 "topn MODEL [requests] | screen MODEL [passes] | serve CONFIG\n";
    return 2;
}
