// Ingest throughput and memory bench (not a test): writes a synthetic shop
// export and times ingest_ratings on it. Measure peak memory from outside:
//   ingest_bench generate 10000000 /tmp/shop-10m.csv
//   /usr/bin/time -v ingest_bench run /tmp/shop-10m.csv [mean]
#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>

#include "model/error.hpp"
#include "model/data/ingest.hpp"

namespace {

// splitmix64: a small, fast, fixed-seed stream; quality is ample for fake data.
uint64_t next(uint64_t& state) {
    uint64_t z = (state += 0x9E3779B97F4A7C15ull);
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
    return z ^ (z >> 31);
}

int generate(uint64_t rows, const char* path) {
    std::FILE* out = std::fopen(path, "wb");
    if (!out) {
        std::perror(path);
        return 1;
    }
    std::fputs("customer_id,sku,stars,rated_at\n", out);
    uint64_t state = 42;
    const uint64_t customers = rows / 50 + 1, skus = rows / 200 + 1;
    char line[96];
    for (uint64_t i = 0; i < rows; ++i) {
        const uint64_t c = next(state) % customers, s = next(state) % skus, half_stars = 1 + next(state) % 10;
        const uint64_t t = 1600000000 + next(state) % 100000000;
        const int n = std::snprintf(line, sizeof line, "cust-%07llu,sku-%06llu,%llu.%c,%llu\n",
                                    static_cast<unsigned long long>(c), static_cast<unsigned long long>(s),
                                    static_cast<unsigned long long>(half_stars / 2), half_stars % 2 ? '5' : '0',
                                    static_cast<unsigned long long>(t));
        std::fwrite(line, 1, static_cast<size_t>(n), out);
    }
    return std::fclose(out) == 0 ? 0 : 1;
}

int run(const char* path, bool mean) {
    credence::IngestOptions options;
    options.path = path;
    options.duplicates = mean ? credence::DuplicatePolicy::mean : credence::DuplicatePolicy::latest;
    uint64_t calls = 0;
    options.progress = [&](uint64_t, uint64_t) { ++calls; };
    const auto start = std::chrono::steady_clock::now();
    try {
        const auto result = credence::ingest_ratings(options);
        const double elapsed_s =
            std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
        std::printf("%s\n", credence::describe(result.summary).c_str());
        std::printf("users %zu, items %zu, fingerprint %s, progress calls %llu\n", result.ratings.users.size(),
                    result.ratings.items.size(), result.summary.fingerprint.c_str(),
                    static_cast<unsigned long long>(calls));
        std::printf("elapsed_s %.2f, rows_per_s %.0f\n", elapsed_s,
                    static_cast<double>(result.summary.rows_read) / elapsed_s);
    } catch (const credence::Error& e) {
        std::fprintf(stderr, "ingest_bench: %s\n", e.what());
        return 1;
    }
    return 0;
}

}  // namespace

int main(int argc, char** argv) {
    if (argc == 4 && std::strcmp(argv[1], "generate") == 0) return generate(std::strtoull(argv[2], nullptr, 10), argv[3]);
    if ((argc == 3 || argc == 4) && std::strcmp(argv[1], "run") == 0)
        return run(argv[2], argc == 4 && std::strcmp(argv[3], "mean") == 0);
    std::fprintf(stderr, "usage: ingest_bench generate ROWS PATH | ingest_bench run PATH [mean]\n");
    return 2;
}
