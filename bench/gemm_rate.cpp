// The machine's dense matrix-multiply rate, the yardstick of scripts/bench-fit
// and scripts/bench-serve (not a test). Built twice from this one file
// (bench/CMakeLists.txt): gemm_rate_portable with the project's portable
// flags and gemm_rate_native with -march=native, so the benchmarks can print
// what the portable build reaches next to what this CPU can do.
//
//   gemm_rate [--threads 1,2] [--size N] [--repetitions R] [--bandwidth]
// prints one line per precision and thread count:
//   "<double|single> <threads> <GFLOP/s>"   (median of R products, 2 n^3 flop each)
// and with --bandwidth, per thread count, the streaming read rate:
//   "bandwidth <threads> <GB/s>"           (best of 5 passes over 512 MiB)
#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>

#include <omp.h>

#include <Eigen/Dense>

namespace {

template <class Matrix>
double median_rate(int n, int threads, int repetitions) {
    const Matrix a = Matrix::Random(n, n), b = Matrix::Random(n, n);
    Matrix c(n, n);
    Eigen::setNbThreads(threads);
    std::vector<double> rates;
    for (int r = -1; r < repetitions; ++r) {  // r = -1 warms up
        const auto start = std::chrono::steady_clock::now();
        c.noalias() = a * b;
        const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        if (r >= 0) rates.push_back(2.0 * double(n) * n * n / s);
    }
    if (!std::isfinite(double(c.sum()))) std::fprintf(stderr, "gemm_rate: non-finite result\n");
    std::sort(rates.begin(), rates.end());
    return rates[rates.size() / 2];
}

// Sums a buffer much larger than the caches and keeps the best pass: the
// rate a scoring pass over item samples could reach. Eight independent
// vectors of sums, so the loop is bound by memory, not by the adds;
// `threads` cores each read their own part.
double read_bandwidth(int threads) {
    const size_t n = size_t(1) << 27;  // 512 MiB of float
    std::vector<float> data(n, 1.0f);
    double best = 0.0;
    float sink = 0.0f;
    constexpr size_t chunk = size_t(1) << 20;
    for (int pass = 0; pass < 5; ++pass) {
        const auto start = std::chrono::steady_clock::now();
        float total = 0.0f;
#pragma omp parallel for num_threads(threads) reduction(+ : total) schedule(static)
        for (size_t c = 0; c < n; c += chunk) {
            float acc[8][16] = {};
            for (size_t i = c; i < c + chunk; i += 128)
                for (int a = 0; a < 8; ++a)
                    for (int l = 0; l < 16; ++l) acc[a][l] += data[i + a * 16 + l];
            for (int a = 0; a < 8; ++a)
                for (int l = 0; l < 16; ++l) total += acc[a][l];
        }
        sink += total;
        const double s = std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        best = std::max(best, double(n * sizeof(float)) / s);
    }
    if (sink < 0.0f) std::printf("?");
    return best;
}

}  // namespace

int main(int argc, char** argv) {
    std::vector<int> threads{1, 2};
    int n = 1024, repetitions = 7;
    bool bandwidth = false;
    for (int a = 1; a < argc; a += 2) {
        std::string flag = argv[a];
        if (flag == "--bandwidth") {
            bandwidth = true;
            --a;
            continue;
        }
        if (a + 1 >= argc) flag.clear();
        if (flag == "--size") n = std::atoi(argv[a + 1]);
        else if (flag == "--repetitions") repetitions = std::atoi(argv[a + 1]);
        else if (flag == "--threads") {
            threads.clear();
            for (const char* p = argv[a + 1]; *p;) {
                threads.push_back(std::atoi(p));
                p = std::strchr(p, ',');
                if (!p) break;
                ++p;
            }
        } else {
            std::fprintf(stderr, "usage: gemm_rate [--threads 1,2] [--size N] [--repetitions R] [--bandwidth]\n");
            return 2;
        }
    }
    for (int t : threads) std::printf("double %d %.2f\n", t, median_rate<Eigen::MatrixXd>(n, t, repetitions) / 1e9);
    for (int t : threads) std::printf("single %d %.2f\n", t, median_rate<Eigen::MatrixXf>(n, t, repetitions) / 1e9);
    if (bandwidth)
        for (int t : threads) std::printf("bandwidth %d %.2f\n", t, read_bandwidth(t) / 1e9);
    return 0;
}
