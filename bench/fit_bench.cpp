// Fit benchmark tool (not a test; scripts/bench-fit drives it).
//
//   fit_bench speed [--users N] [--items N] [--per-user N] [--ranks 8,16,32]
//                   [--threads 1,2] [--sweeps N] [--warmup N] [--gemm-size N] [--no-biases]
//       Times Gibbs sweeps on synthetic data (tests/support/simulate.hpp) next
//       to the machine's dense double matrix multiply at each thread count,
//       measured in the same run by gemm_rate_native (Eigen built for this
//       CPU: the yardstick) and gemm_rate_portable (the product's portable
//       flags). Prints one table row per (rank, threads) and one per rank with
//       the thread speed-up. "cpu s" is the process CPU time of a sweep (all
//       threads): with 2 threads near 2x "s/sweep" when both cores were ours.
//   fit_bench run [--rank K] [--threads T] [--sweeps N] (and the data flags)
//       Wall time of N consecutive sweeps (default 200) from a fresh state.
//   fit_bench scale [--sizes 1,4,16] [--rank K] [--threads T] [--sweeps N]
//       For each size (millions of ratings; users and items grow by the square
//       root of the factor, so the density stays that of 1M = 20,000 x 5,000),
//       in a child process: seconds per sweep, nanoseconds per rating visit
//       and the child's peak resident memory (data, both layouts and the state).
//   fit_bench csv PATH [--users N] [--items N] [--per-user N] [--seed N]
//       Writes synthetic ratings as "customer,product,stars" CSV for a real
//       `credence fit`; prints "ratings R users U items I" on stdout.
//   fit_bench budget --ratings R --users U --items I --rank K --samples S [--no-biases]
//       Prints the memory budget of a fit: 64 bytes per rating plus the
//       bytes of the kept samples (the Posterior's per-sample arrays).
//
// Flops are counted the same way everywhere (see count_sweep_flops); the
// dimension d of a row draw is rank + 1 with biases (the bias rides along
// as one more coordinate), rank without.
#include <omp.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <ctime>
#include <filesystem>
#include <fstream>
#include <map>
#include <stdexcept>
#include <string>
#include <vector>

#include <Eigen/Dense>

#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/sampler.hpp"
#include "model/math/cpu_level.hpp"
#include "tests/support/simulate.hpp"
#include "model/fit/sparse.hpp"

namespace {

using clock_type = std::chrono::steady_clock;

double seconds_since(clock_type::time_point start) {
    return std::chrono::duration<double>(clock_type::now() - start).count();
}

double median(std::vector<double> v) {
    std::sort(v.begin(), v.end());
    const size_t n = v.size();
    return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

// The one-minute load average, so noisy figures can be read against it.
double load_average_1min() {
    std::ifstream in("/proc/loadavg");
    double one = -1.0;
    in >> one;
    return one;
}

// Flags as "--name value" pairs plus bare "--flag" switches.
struct Args {
    std::map<std::string, std::string> values;
    std::vector<std::string> positional;

    Args(int argc, char** argv, int first) {
        for (int a = first; a < argc; ++a) {
            std::string s = argv[a];
            if (s.rfind("--", 0) == 0) {
                const bool is_switch = a + 1 >= argc || std::strncmp(argv[a + 1], "--", 2) == 0;
                values[s.substr(2)] = is_switch ? "1" : argv[++a];
            } else {
                positional.push_back(s);
            }
        }
    }
    uint64_t number(const std::string& name, uint64_t fallback) const {
        auto it = values.find(name);
        return it == values.end() ? fallback : std::stoull(it->second);
    }
    bool flag(const std::string& name) const { return values.count(name) > 0; }
    std::vector<int> list(const std::string& name, const std::string& fallback) const {
        auto it = values.find(name);
        std::string s = it == values.end() ? fallback : it->second;
        std::vector<int> out;
        size_t pos = 0;
        while (pos < s.size()) {
            size_t comma = s.find(',', pos);
            if (comma == std::string::npos) comma = s.size();
            out.push_back(std::stoi(s.substr(pos, comma - pos)));
            pos = comma + 1;
        }
        return out;
    }
};

credence::SimulationOptions simulation(const Args& args) {
    credence::SimulationOptions sim;
    sim.users = static_cast<uint32_t>(args.number("users", 20000));
    sim.items = static_cast<uint32_t>(args.number("items", 5000));
    sim.ratings_per_user = static_cast<uint32_t>(args.number("per-user", 50));
    sim.rank = 8;  // the truth's rank; sweep cost depends only on the fitted rank
    sim.noise_sd = 0.5;
    sim.bias_sd = 0.3;
    sim.seed = args.number("seed", 7);
    return sim;
}

// Flops of one sweep, counted as the benchmark contract says: per rating
// visit (each rating is visited twice, once per side) d(d+1) for the
// symmetric rank-one update of the lower triangle plus 2d for the
// right-hand side; per row d^3/3 for the Cholesky plus 4d^2 for the two
// triangular solves and the draw.
double count_sweep_flops(uint64_t ratings, uint64_t rows, double d) {
    return 2.0 * double(ratings) * (d * (d + 1.0) + 2.0 * d) + double(rows) * (d * d * d / 3.0 + 4.0 * d * d);
}

// Where this program lives: the gemm_rate tools are built beside it.
std::filesystem::path tool_dir;

// GEMM rates (GFLOP/s) by precision ("double", "single") and thread count,
// from one of the gemm_rate tools (bench/gemm_rate.cpp).
using GemmRates = std::map<std::string, std::map<int, double>>;

GemmRates gemm_rates(const std::string& tool, const std::vector<int>& thread_counts, int n) {
    std::string threads;
    for (int t : thread_counts) {
        if (!threads.empty()) threads.push_back(',');
        threads.append(std::to_string(t));
    }
    // Built with append: GCC 12 warns falsely (-Wrestrict) on chains of + here.
    std::string command = (tool_dir / tool).string();
    command.append(" --threads ").append(threads).append(" --size ").append(std::to_string(n));
    FILE* pipe = popen(command.c_str(), "r");
    if (!pipe) throw std::runtime_error("cannot run " + command);
    GemmRates out;
    char precision[16];
    int t = 0;
    double rate = 0.0;
    while (std::fscanf(pipe, "%15s %d %lf", precision, &t, &rate) == 3) out[precision][t] = rate;
    if (pclose(pipe) != 0 || out["double"].size() != thread_counts.size())
        throw std::runtime_error(command + " failed");
    return out;
}

// Process CPU seconds (all threads), to show how many cores a sweep kept busy.
double process_cpu_s() {
    timespec ts{};
    clock_gettime(CLOCK_PROCESS_CPUTIME_ID, &ts);
    return double(ts.tv_sec) + 1e-9 * double(ts.tv_nsec);
}

struct SweepTiming {
    std::vector<double> wall_s, cpu_s;
    credence::FactorRows final_user_factors;
    double median_s() const { return median(wall_s); }
    double min_s() const { return *std::min_element(wall_s.begin(), wall_s.end()); }
    double cpu_median_s() const { return median(cpu_s); }
};

// Times `sweeps` sweeps at each thread count, interleaved sweep by sweep so a
// change in the machine's load hits every thread count alike. Each thread
// count runs its own chain from the same seed, so the chains must agree.
std::map<int, SweepTiming> time_sweeps(const credence::GibbsData& data, const credence::FitOptions& options,
                                       const std::vector<int>& thread_counts, int warmup, int sweeps) {
    std::map<int, credence::GibbsState> states;
    std::map<int, SweepTiming> out;
    for (int t : thread_counts) states[t] = credence::initial_state(data, options, options.seed, 0);
    for (int s = 0; s < warmup + sweeps; ++s) {
        for (int t : thread_counts) {
            const double cpu0 = process_cpu_s();
            const auto start = clock_type::now();
            credence::gibbs_sweep(data, options, credence::SweepKey{options.seed, 0, uint32_t(s)}, states[t], t);
            const double wall = seconds_since(start), cpu = process_cpu_s() - cpu0;
            if (s >= warmup) {
                out[t].wall_s.push_back(wall);
                out[t].cpu_s.push_back(cpu);
            }
        }
    }
    for (int t : thread_counts) out[t].final_user_factors = std::move(states[t].user_factors);
    return out;
}

credence::FitOptions sweep_options(const Args& args, uint32_t rank) {
    credence::FitOptions options;
    options.rank = rank;
    options.biases = !args.flag("no-biases");
    options.seed = 11;
    options.init_scale = 0.5;
    return options;
}

int run_speed(const Args& args) {
    const auto sim_options = simulation(args);
    const std::vector<int> ranks = args.list("ranks", "8,16,32");
    const std::vector<int> thread_counts = args.list("threads", "1,2");
    const int sweeps = static_cast<int>(args.number("sweeps", 5));
    const int warmup = static_cast<int>(args.number("warmup", 1));
    const int gemm_n = static_cast<int>(args.number("gemm-size", 1024));
    const bool biases = !args.flag("no-biases");

    const auto sim = credence::simulate_ratings(sim_options);
    const auto by_user = credence::csr_by_user(sim.ratings);
    const auto by_item = credence::csr_by_item(sim.ratings);
    const credence::GibbsData data{&by_user, &by_item, sim.ratings.mean()};
    const uint64_t nnz = by_user.nnz(), rows = uint64_t(by_user.num_rows) + by_item.num_rows;
    std::printf("data: %llu ratings, %u users x %u items; %d timed sweeps (median) after %d warm-up; "
                "row dimension d = rank%s; %d cores online\n",
                static_cast<unsigned long long>(nnz), by_user.num_rows, by_item.num_rows, sweeps, warmup,
                biases ? " + 1 (biases on)" : " (biases off)", omp_get_num_procs());

    std::printf("kernels: %s\n", credence::cpu_level_description().c_str());
    const GemmRates native = gemm_rates("gemm_rate_native", thread_counts, gemm_n);
    const GemmRates portable = gemm_rates("gemm_rate_portable", thread_counts, gemm_n);
    for (int t : thread_counts)
        std::printf("gemm %dx%d, %d thread(s), GFLOP/s (median of 7): double %.2f native, %.2f portable; "
                    "single %.2f native, %.2f portable\n",
                    gemm_n, gemm_n, t, native.at("double").at(t), portable.at("double").at(t),
                    native.at("single").at(t), portable.at("single").at(t));
    std::printf("yardstick: the sampler's arithmetic is double, so each ratio is against double GEMM: "
                "\"of native\" (Eigen built for this CPU) and \"of portable\" (the product's flags)\n");
    const std::map<int, double>& gemm = native.at("double");
    const std::map<int, double>& gemm_portable = portable.at("double");

    std::printf("\n%5s %7s %10s %10s %10s %16s %13s %10s %10s %7s\n", "rank", "threads", "s/sweep", "min s", "cpu s",
                "rating-sweeps/s", "sampler GF/s", "of native", "of portbl", "load1");
    for (int rank : ranks) {
        const credence::FitOptions options = sweep_options(args, static_cast<uint32_t>(rank));
        const double d = rank + (biases ? 1 : 0);
        const double flops = count_sweep_flops(nnz, rows, d);
        const auto by_threads = time_sweeps(data, options, thread_counts, warmup, sweeps);
        for (const auto& [t, timing] : by_threads) {
            const double rate = flops / timing.median_s() / 1e9;
            std::printf("%5d %7d %10.4f %10.4f %10.4f %16.3g %13.2f %9.1f%% %9.1f%% %7.2f\n", rank, t, timing.median_s(),
                        timing.min_s(), timing.cpu_median_s(), double(nnz) / timing.median_s(), rate,
                        100.0 * rate / gemm.at(t), 100.0 * rate / gemm_portable.at(t), load_average_1min());
        }
        std::fflush(stdout);
        if (by_threads.count(1) && by_threads.size() > 1) {
            const auto& one = by_threads.at(1);
            for (const auto& [t, timing] : by_threads) {
                if (t == 1) continue;
                // With other work on the machine the wall-clock speed-up understates what
                // idle cores give; the CPU-time ratio shows the parallel overhead alone
                // (1.00: the threads did no more work in total than one thread did).
                std::printf("speed-up rank %d: %d threads vs 1: %.2fx (median), %.2fx (best); GEMM %.2fx; "
                            "CPU-time ratio 1/%d threads %.2f; samples %s\n",
                            rank, t, one.median_s() / timing.median_s(), one.min_s() / timing.min_s(),
                            gemm.at(t) / gemm.at(1), t, one.cpu_median_s() / timing.cpu_median_s(),
                            timing.final_user_factors == one.final_user_factors ? "bit-identical" : "DIFFER");
            }
        }
    }
    return 0;
}

// Wall time of N consecutive sweeps from a fresh state (what a fit's
// sampling costs, group moves included; no ingest, no writing).
int run_sweeps(const Args& args) {
    const auto sim = credence::simulate_ratings(simulation(args));
    const auto by_user = credence::csr_by_user(sim.ratings);
    const auto by_item = credence::csr_by_item(sim.ratings);
    const credence::GibbsData data{&by_user, &by_item, sim.ratings.mean()};
    const auto rank = static_cast<uint32_t>(args.number("rank", 16));
    const int threads = static_cast<int>(args.number("threads", 2));
    const auto sweeps = static_cast<uint32_t>(args.number("sweeps", 200));
    const credence::FitOptions options = sweep_options(args, rank);
    credence::GibbsState st = credence::initial_state(data, options, options.seed, 0);
    const double load_before = load_average_1min();
    const double cpu0 = process_cpu_s();
    const auto start = clock_type::now();
    for (uint32_t s = 0; s < sweeps; ++s)
        credence::gibbs_sweep(data, options, credence::SweepKey{options.seed, 0, s}, st, threads);
    const double wall = seconds_since(start), cpu = process_cpu_s() - cpu0;
    std::printf("run: %u sweeps of %llu ratings at rank %u on %d thread(s): %.2f s wall (%.4f s/sweep), "
                "%.2f s CPU; load average %.2f before, %.2f after; kernels %s\n",
                sweeps, static_cast<unsigned long long>(by_user.nnz()), rank, threads, wall, wall / sweeps, cpu,
                load_before, load_average_1min(), credence::cpu_level_description().c_str());
    return 0;
}

// One size of the scale run, in this (child) process: "s/sweep ns/visit ratings users items".
void scale_child(const Args& args, double millions, int out_fd) {
    const double grow = std::sqrt(millions);
    credence::SimulationOptions sim_options = simulation(args);
    sim_options.users = static_cast<uint32_t>(std::lround(20000 * grow));
    sim_options.items = static_cast<uint32_t>(std::lround(5000 * grow));
    sim_options.ratings_per_user = static_cast<uint32_t>(std::lround(50 * grow));
    const auto sim = credence::simulate_ratings(sim_options);
    const auto by_user = credence::csr_by_user(sim.ratings);
    const auto by_item = credence::csr_by_item(sim.ratings);
    const credence::GibbsData data{&by_user, &by_item, sim.ratings.mean()};
    const auto rank = static_cast<uint32_t>(args.number("rank", 16));
    const int threads = static_cast<int>(args.number("threads", 2));
    const auto sweeps = static_cast<uint32_t>(args.number("sweeps", 5));
    const credence::FitOptions options = sweep_options(args, rank);
    credence::GibbsState st = credence::initial_state(data, options, options.seed, 0);
    credence::gibbs_sweep(data, options, credence::SweepKey{options.seed, 0, 0}, st, threads);  // warm-up
    std::vector<double> wall;
    for (uint32_t s = 1; s <= sweeps; ++s) {
        const auto start = clock_type::now();
        credence::gibbs_sweep(data, options, credence::SweepKey{options.seed, 0, s}, st, threads);
        wall.push_back(seconds_since(start));
    }
    const double per_sweep = median(wall);
    const std::string line = std::to_string(per_sweep) + " " + std::to_string(1e9 * per_sweep / (2.0 * by_user.nnz())) +
                             " " + std::to_string(by_user.nnz()) + " " + std::to_string(by_user.num_rows) + " " +
                             std::to_string(by_item.num_rows) + "\n";
    if (write(out_fd, line.data(), line.size()) != static_cast<ssize_t>(line.size())) std::_Exit(3);
}

int run_scale(const Args& args) {
    std::printf("scale: rank %llu, %llu thread(s), median of %llu sweeps after one warm-up; each size in its own "
                "process (peak RSS: synthetic ratings, both layouts, the state)\n",
                static_cast<unsigned long long>(args.number("rank", 16)),
                static_cast<unsigned long long>(args.number("threads", 2)),
                static_cast<unsigned long long>(args.number("sweeps", 5)));
    std::printf("%10s %8s %8s %10s %14s %12s %9s %7s\n", "ratings", "users", "items", "s/sweep", "ns/rating-visit",
                "vs smallest", "peak MB", "load1");
    std::fflush(stdout);
    double first_ns = 0.0;
    for (int millions : args.list("sizes", "1,4,16")) {
        int fds[2];
        if (pipe(fds) != 0) throw std::runtime_error("scale: pipe failed");
        const pid_t child = fork();
        if (child < 0) throw std::runtime_error("scale: fork failed");
        if (child == 0) {
            close(fds[0]);
            try {
                scale_child(args, millions, fds[1]);
            } catch (const std::exception& e) {
                std::fprintf(stderr, "fit_bench scale: %s\n", e.what());
                std::_Exit(1);
            }
            std::_Exit(0);
        }
        close(fds[1]);
        char buffer[256] = {};
        const ssize_t got = read(fds[0], buffer, sizeof buffer - 1);
        close(fds[0]);
        int status = 0;
        rusage usage{};
        wait4(child, &status, 0, &usage);
        if (got <= 0 || !WIFEXITED(status) || WEXITSTATUS(status) != 0)
            throw std::runtime_error("scale: the child for " + std::to_string(millions) + "M ratings failed");
        double per_sweep = 0, ns = 0;
        unsigned long long ratings = 0, users = 0, items = 0;
        std::sscanf(buffer, "%lf %lf %llu %llu %llu", &per_sweep, &ns, &ratings, &users, &items);
        if (first_ns == 0.0) first_ns = ns;
        std::printf("%10llu %8llu %8llu %10.4f %14.2f %11.2fx %9.1f %7.2f\n", ratings, users, items, per_sweep, ns,
                    ns / first_ns, double(usage.ru_maxrss) * 1024.0 / 1e6, load_average_1min());
        std::fflush(stdout);
    }
    return 0;
}

int run_csv(const Args& args) {
    if (args.positional.empty()) throw std::invalid_argument("csv: give the output path");
    const auto sim = credence::simulate_ratings(simulation(args));
    std::FILE* out = std::fopen(args.positional[0].c_str(), "wb");
    if (!out) throw std::runtime_error("csv: cannot write " + args.positional[0]);
    std::fputs("customer,product,stars\n", out);
    for (const auto& r : sim.ratings.ratings)
        std::fprintf(out, "%s,%s,%.3f\n", sim.ratings.users.name(r.user).c_str(), sim.ratings.items.name(r.item).c_str(),
                     double(r.value));
    if (std::fclose(out) != 0) throw std::runtime_error("csv: write failed for " + args.positional[0]);
    std::printf("ratings %zu users %zu items %zu\n", sim.ratings.size(), sim.ratings.users.size(),
                sim.ratings.items.size());
    return 0;
}

// Bytes of the kept samples as the Posterior holds them (model/posterior/posterior.hpp):
// factors and biases of every row, plus tau, mu, Lambda and bias precisions.
int run_budget(const Args& args) {
    const uint64_t R = args.number("ratings", 0), U = args.number("users", 0), I = args.number("items", 0);
    const uint64_t K = args.number("rank", 0), S = args.number("samples", 0);
    const bool biases = !args.flag("no-biases");
    const uint64_t per_sample = 4 * ((U + I) * K + (biases ? U + I + 2 : 0) + 1 + 2 * K + 2 * K * K) + 4;
    const uint64_t samples_bytes = S * per_sample;
    std::printf("rating_bytes %llu samples_bytes %llu budget_bytes %llu\n", static_cast<unsigned long long>(64 * R),
                static_cast<unsigned long long>(samples_bytes), static_cast<unsigned long long>(64 * R + samples_bytes));
    return 0;
}

}  // namespace

int main(int argc, char** argv) {
    const std::string usage =
        "usage: fit_bench speed [--users N --items N --per-user N --ranks 8,16,32 --threads 1,2 --sweeps N]\n"
        "       fit_bench run [--rank K --threads T --sweeps N]\n"
        "       fit_bench scale [--sizes 1,4,16 --rank K --threads T --sweeps N]\n"
        "       fit_bench csv PATH [--users N --items N --per-user N --seed N]\n"
        "       fit_bench budget --ratings R --users U --items I --rank K --samples S [--no-biases]\n";
    if (argc < 2) {
        std::fputs(usage.c_str(), stderr);
        return 2;
    }
    try {
        const Args args(argc, argv, 2);
        const std::string mode = argv[1];
        tool_dir = std::filesystem::path(argv[0]).parent_path();
        if (mode == "speed") return run_speed(args);
        if (mode == "run") return run_sweeps(args);
        if (mode == "scale") return run_scale(args);
        if (mode == "csv") return run_csv(args);
        if (mode == "budget") return run_budget(args);
    } catch (const std::exception& e) {
        std::fprintf(stderr, "fit_bench: %s\n", e.what());
        return 1;
    }
    std::fputs(usage.c_str(), stderr);
    return 2;
}
