// The machine's dense matrix-multiply rate, the yardstick of scripts/bench-fit
// and scripts/bench-serve (not a test). Built twice from this one file
// (bench/CMakeLists.txt): gemm_rate_portable with the project's portable
// flags and gemm_rate_native with -march=native, so the benchmarks can print
// what the portable build reaches next to what this CPU can do.
//
//   gemm_rate [--threads 1,2] [--size N] [--repetitions R]
// prints one line per precision and thread count:
//   "<double|single> <threads> <GFLOP/s>"   (median of R products, 2 n^3 flop each)
#include <algorithm>
#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>

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

}  // namespace

int main(int argc, char** argv) {
    std::vector<int> threads{1, 2};
    int n = 1024, repetitions = 7;
    for (int a = 1; a + 1 < argc; a += 2) {
        const std::string flag = argv[a];
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
            std::fprintf(stderr, "usage: gemm_rate [--threads 1,2] [--size N] [--repetitions R]\n");
            return 2;
        }
    }
    for (int t : threads) std::printf("double %d %.2f\n", t, median_rate<Eigen::MatrixXd>(n, t, repetitions) / 1e9);
    for (int t : threads) std::printf("single %d %.2f\n", t, median_rate<Eigen::MatrixXf>(n, t, repetitions) / 1e9);
    return 0;
}
