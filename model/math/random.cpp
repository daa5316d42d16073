#include "model/math/random.hpp"

#include <stdexcept>

namespace credence {

namespace {
uint64_t splitmix64(uint64_t& x) {
    uint64_t z = (x += 0x9E3779B97F4A7C15ull);
    z = (z ^ (z >> 30)) * 0xBF58476D1CE4E5B9ull;
    z = (z ^ (z >> 27)) * 0x94D049BB133111EBull;
    return z ^ (z >> 31);
}
__extension__ typedef unsigned __int128 u128;  // GCC/Clang extension, for Lemire's method
uint64_t rotl(uint64_t x, int k) { return (x << k) | (x >> (64 - k)); }
}  // namespace

Rng::Rng(uint64_t seed) {
    uint64_t x = seed;
    for (auto& s : s_) s = splitmix64(x);
}

Rng Rng::keyed(uint64_t seed, uint32_t chain, uint32_t sweep, StreamBlock block, uint64_t row) {
    // Fold the key through splitmix64 one field at a time so that nearby keys
    // give unrelated states.
    uint64_t x = seed;
    uint64_t h = splitmix64(x);
    x = h ^ (static_cast<uint64_t>(chain) << 32 | sweep);
    h = splitmix64(x);
    x = h ^ (static_cast<uint64_t>(block) << 56) ^ row;
    h = splitmix64(x);
    return Rng(h);
}

uint64_t Rng::next_u64() {
    const uint64_t result = rotl(s_[0] + s_[3], 23) + s_[0];
    const uint64_t t = s_[1] << 17;
    s_[2] ^= s_[0];
    s_[3] ^= s_[1];
    s_[1] ^= s_[2];
    s_[0] ^= s_[3];
    s_[2] ^= t;
    s_[3] = rotl(s_[3], 45);
    return result;
}

double Rng::uniform() {
    // 53 random bits, shifted by half an ulp so 0 is impossible.
    return (static_cast<double>(next_u64() >> 11) + 0.5) * 0x1.0p-53;
}

double Rng::normal() {
    if (has_cached_normal_) {
        has_cached_normal_ = false;
        return cached_normal_;
    }
    double u, v, s;
    do {
        u = 2.0 * uniform() - 1.0;
        v = 2.0 * uniform() - 1.0;
        s = u * u + v * v;
    } while (s >= 1.0 || s == 0.0);
    const double f = std::sqrt(-2.0 * std::log(s) / s);
    cached_normal_ = v * f;
    has_cached_normal_ = true;
    return u * f;
}

double Rng::gamma(double shape) {
    if (!(shape > 0.0) || !std::isfinite(shape)) throw std::invalid_argument("gamma shape must be positive and finite");
    if (shape < 1.0) {
        // Gamma(a) = Gamma(a+1) * U^(1/a)
        const double g = gamma(shape + 1.0);
        return g * std::pow(uniform(), 1.0 / shape);
    }
    const double d = shape - 1.0 / 3.0;
    const double c = 1.0 / std::sqrt(9.0 * d);
    for (;;) {
        double x, v;
        do {
            x = normal();
            v = 1.0 + c * x;
        } while (v <= 0.0);
        v = v * v * v;
        const double u = uniform();
        if (u < 1.0 - 0.0331 * x * x * x * x) return d * v;
        if (std::log(u) < 0.5 * x * x + d * (1.0 - v + std::log(v))) return d * v;
    }
}

uint64_t Rng::below(uint64_t n) {
    if (n == 0) throw std::invalid_argument("Rng::below needs n > 0");
    u128 m = static_cast<u128>(next_u64()) * n;
    uint64_t low = static_cast<uint64_t>(m);
    if (low < n) {
        const uint64_t threshold = -n % n;
        while (low < threshold) {
            m = static_cast<u128>(next_u64()) * n;
            low = static_cast<uint64_t>(m);
        }
    }
    return static_cast<uint64_t>(m >> 64);
}

}  // namespace credence
