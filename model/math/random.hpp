// Random streams keyed by position, not by order of use.
//
// Each Gibbs draw takes its randomness from a stream keyed by
// (seed, chain, sweep, block, row): the same seed gives bit-identical samples
// whatever the thread count or scheduling, because no row ever shares a
// stream with another. The generator is xoshiro256++ (Blackman & Vigna 2018)
// seeded through splitmix64 (Steele, Lea & Flood 2014) from a mix of the key.
#pragma once
#include <cmath>
#include <cstddef>
#include <cstdint>

namespace credence {

// Which part of a sweep a stream belongs to; keeps streams of different
// blocks apart even when (chain, sweep, row) coincide.
enum class StreamBlock : uint32_t {
    user_rows = 1,
    item_rows = 2,
    user_hyper = 3,
    item_hyper = 4,
    noise = 5,
    init = 6,
    split = 7,     // train/holdout splits
    simulate = 8,  // synthetic data
    serve = 9,     // per-request draws in the server
    foldin = 10,
    group_moves = 11,  // joint moves along directions the likelihood leaves flat
};

class Rng {
public:
    explicit Rng(uint64_t seed);
    // The stream for one row of one block of one sweep of one chain.
    static Rng keyed(uint64_t seed, uint32_t chain, uint32_t sweep, StreamBlock block, uint64_t row);

    uint64_t next_u64();
    // Uniform on the open interval (0, 1): never returns 0 or 1, so logs are safe.
    double uniform();
    // Standard normal (the ziggurat of Marsaglia & Tsang 2000, 256 layers;
    // about 1.01 draws of next_u64 per variate, a log only in the tail).
    double normal();
    // out[0 .. n) = n standard normals, the same as n calls of normal() (and
    // faster). Borrows out.
    void normals(double* out, size_t n);
    // Gamma(shape, rate=1) for shape > 0 (Marsaglia & Tsang 2000; shape < 1
    // via the boost U^(1/shape)). Caller scales by 1/rate. Throws
    // std::invalid_argument for a shape that is not positive and finite.
    double gamma(double shape);
    // Uniform integer in [0, n), n > 0 (Lemire's nearly-divisionless method).
    // Throws std::invalid_argument for n == 0.
    uint64_t below(uint64_t n);

private:
    uint64_t s_[4];
};

// For the tests: the top layer's area of the normal ziggurat divided by the
// area every layer should have (1 when the tables close).
double ziggurat_top_layer_area();

}  // namespace credence
