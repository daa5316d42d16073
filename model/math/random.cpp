#include "model/math/random.hpp"

#include <cmath>
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

// One xoshiro256++ step on the state s (Blackman & Vigna 2018): the one
// definition Rng::next_u64 and the register copy in Rng::normals share.
inline uint64_t xoshiro_next(uint64_t& s0, uint64_t& s1, uint64_t& s2, uint64_t& s3) {
    const uint64_t result = rotl(s0 + s3, 23) + s0;
    const uint64_t t = s1 << 17;
    s2 ^= s0;
    s3 ^= s1;
    s1 ^= s2;
    s0 ^= s3;
    s2 ^= t;
    s3 = rotl(s3, 45);
    return result;
}

// Uniform on (0, 1) from 64 random bits: the top 53, shifted by half an
// ulp so 0 is impossible.
inline double open_unit(uint64_t bits) { return (static_cast<double>(bits >> 11) + 0.5) * 0x1.0p-53; }

// The ziggurat for the standard normal (Marsaglia & Tsang 2000, "The
// Ziggurat Method for Generating Random Variables", J. Stat. Softw. 5(8)):
// under f(x) = exp(-x^2 / 2), x >= 0, 256 layers of equal area v stacked
// from the base. Layer 0 is the strip [0, r] x [0, f(r)] plus the tail
// beyond r; layer i >= 1 is the rectangle [0, x_i] x [f(x_i), f(x_{i+1})].
// The edges: x_1 = r, x_{i+1} = f^-1(f(x_i) + v / x_i), x_256 = 0, and
// x_0 = v / f(r) is the width that gives layer 0 the area v. r is the
// paper's 256-layer value (quoted from memory, and recomputed by
// root-finding on the closure condition with scipy before it was written);
// tests/model/math/test_random.cpp checks that the top layer closes (its
// area is v) and the variates against the normal CDF.
struct Ziggurat {
    static constexpr int kLayers = 256;
    static constexpr double kR = 3.6541528853610088;
    double v = 0.0;                  // each layer's area
    double edge[kLayers + 1] = {};   // x_i
    double height[kLayers + 1] = {}; // f(x_i)

    Ziggurat() {
        const double f_r = std::exp(-0.5 * kR * kR);
        v = kR * f_r + std::sqrt(M_PI / 2.0) * std::erfc(kR / std::sqrt(2.0));
        edge[0] = v / f_r;
        height[0] = 0.0;  // never read: layer 0 takes the tail, not a wedge
        edge[1] = kR;
        height[1] = f_r;
        for (int i = 1; i < kLayers - 1; ++i) {
            height[i + 1] = height[i] + v / edge[i];
            edge[i + 1] = std::sqrt(-2.0 * std::log(height[i + 1]));
        }
        edge[kLayers] = 0.0;
        height[kLayers] = 1.0;
    }
};

const Ziggurat& ziggurat() {
    static const Ziggurat table;
    return table;
}
}  // namespace

double ziggurat_top_layer_area() {
    const Ziggurat& z = ziggurat();
    return z.edge[Ziggurat::kLayers - 1] * (1.0 - z.height[Ziggurat::kLayers - 1]) / z.v;
}

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

uint64_t Rng::next_u64() { return xoshiro_next(s_[0], s_[1], s_[2], s_[3]); }

double Rng::uniform() { return open_unit(next_u64()); }

namespace {
// xoshiro256++ on a copy of the state held in registers, for loops of draws
// (through `this`, every draw stored and reloaded the state).
struct LocalState {
    uint64_t s0, s1, s2, s3;
    uint64_t next() { return xoshiro_next(s0, s1, s2, s3); }
    double uniform() { return open_unit(next()); }
};

// One standard normal. One 64-bit draw gives the layer (bits 0-7), the sign
// (bit 8) and a uniform on [0, 1) (bits 11-63): separate bits, so the layer
// and the point in it are independent (the dependence Doornik 2005 found
// came from reusing the same bits for both).
inline double ziggurat_normal(LocalState& st, const Ziggurat& z) {
    for (;;) {
        const uint64_t bits = st.next();
        const unsigned layer = static_cast<unsigned>(bits & 0xff);
        const double sign = (bits & 0x100) != 0 ? -1.0 : 1.0;
        const double x = static_cast<double>(bits >> 11) * 0x1.0p-53 * z.edge[layer];
        if (x < z.edge[layer + 1]) [[likely]]
            return sign * x;  // inside the curve whatever the height (~99% of draws)
        if (layer == 0) {
            // The tail beyond r (Marsaglia 1964): r + a with a = -log(u1) / r,
            // accepted when -2 log(u2) > a^2.
            for (;;) {
                const double a = -std::log(st.uniform()) / Ziggurat::kR;
                const double b = -std::log(st.uniform());
                if (b + b > a * a) return sign * (Ziggurat::kR + a);
            }
        }
        // The wedge between x_{layer+1} and x_layer: a uniform height in the
        // layer, accepted under the curve.
        const double y = z.height[layer] + st.uniform() * (z.height[layer + 1] - z.height[layer]);
        if (y < std::exp(-0.5 * x * x)) return sign * x;
    }
}
}  // namespace

double Rng::normal() {
    double z;
    normals(&z, 1);
    return z;
}

void Rng::normals(double* out, size_t n) {
    const Ziggurat& z = ziggurat();
    LocalState st{s_[0], s_[1], s_[2], s_[3]};
    for (size_t i = 0; i < n; ++i) out[i] = ziggurat_normal(st, z);
    s_[0] = st.s0;
    s_[1] = st.s1;
    s_[2] = st.s2;
    s_[3] = st.s3;
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
