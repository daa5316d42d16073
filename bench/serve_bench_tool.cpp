// Helper for scripts/bench-serve (not part of the product):
//   serve_bench_tool model OUT [items rank samples users]  writes a synthetic posterior
//   serve_bench_tool bandwidth                             prints streaming read bandwidth, bytes/s
//   serve_bench_tool serve CONFIG                          runs the server (when `credence serve` is absent)
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <iostream>
#include <string>
#include <vector>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/simulate.hpp"
#include "server/server.hpp"

namespace {

// Sums a buffer much larger than the caches, several times, and keeps the
// best pass: that is the rate a scoring pass over item samples could reach.
double read_bandwidth_bytes_per_s() {
    const size_t n = size_t(1) << 27;  // 512 MiB of float
    std::vector<float> data(n, 1.0f);
    double best = 0.0;
    volatile float sink = 0.0f;
    for (int pass = 0; pass < 5; ++pass) {
        const auto start = std::chrono::steady_clock::now();
        float a0 = 0, a1 = 0, a2 = 0, a3 = 0, a4 = 0, a5 = 0, a6 = 0, a7 = 0;
        for (size_t i = 0; i < n; i += 8) {
            a0 += data[i]; a1 += data[i + 1]; a2 += data[i + 2]; a3 += data[i + 3];
            a4 += data[i + 4]; a5 += data[i + 5]; a6 += data[i + 6]; a7 += data[i + 7];
        }
        sink = sink + a0 + a1 + a2 + a3 + a4 + a5 + a6 + a7;
        const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        best = std::max(best, n * sizeof(float) / s);
    }
    return best;
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
        if (cmd == "bandwidth") {
            std::printf("%.0f\n", read_bandwidth_bytes_per_s());
            return 0;
        }
        if (cmd == "serve" && argc >= 3)
            return credence::server::run_server(credence::server::load_serve_config(argv[2]));
    } catch (const std::exception& e) {
        std::cerr << "serve_bench_tool: " << e.what() << "\n";
        return 1;
    }
    std::cerr << "usage: serve_bench_tool model OUT [items rank samples users] | bandwidth | serve CONFIG\n";
    return 2;
}
