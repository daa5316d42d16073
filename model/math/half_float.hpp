// IEEE 754 binary16 ("half") conversions for the screening pass's compact
// copy of the item factors (model/predict/screening.cpp). Governed by IEEE
// 754-2008, section 3.6 (binary16: 1 sign bit, 5 exponent bits with bias 15,
// 10 stored significand bits). The screening kernels widen halves with F16C
// (model/predict/screening_kernels.cpp), which is exact, as is float_from_half.
#pragma once
#include <cmath>
#include <cstdint>
#include <cstring>

namespace credence {

// The largest finite half; anything of greater magnitude would round to
// infinity, so callers check against it before converting.
inline constexpr float kLargestHalf = 65504.0f;

// x rounded to the nearest half, ties to even. Needs |x| <= kLargestHalf and
// x finite (callers check; anything else is a bug and gives the bits of an
// infinity or a NaN, without a throw).
inline uint16_t half_from_float(float x) {
    uint32_t bits;
    std::memcpy(&bits, &x, sizeof bits);
    const auto sign = static_cast<uint16_t>((bits >> 16) & 0x8000u);
    bits &= 0x7fffffffu;
    if (bits >= 0x477ff000u) return sign | (bits > 0x7f800000u ? 0x7e00u : 0x7c00u);  // 65520 and up
    if (bits < 0x38800000u) {
        // Below 2^-14: a subnormal half with mantissa round(|x| 2^24). Scaling
        // by a power of two is exact and nearbyint rounds ties to even (the
        // default rounding mode); 1024 there is the smallest normal half, 0x400.
        float magnitude;
        std::memcpy(&magnitude, &bits, sizeof magnitude);
        return sign | static_cast<uint16_t>(std::nearbyint(magnitude * 0x1p24f));
    }
    // Normal: 23 significand bits to 10, ties to even (a carry moves into the
    // exponent, as it should), exponent bias 127 to 15.
    bits += 0xfffu + ((bits >> 13) & 1u);
    bits -= (127u - 15u) << 23;
    return sign | static_cast<uint16_t>(bits >> 13);
}

// The finite half h as a float: exact, every half is a float. Infinities and
// NaNs are not decoded (the screening copy holds none).
inline float float_from_half(uint16_t h) {
    const uint32_t sign = static_cast<uint32_t>(h & 0x8000u) << 16;
    const uint32_t exponent = (h >> 10) & 0x1fu, mantissa = h & 0x3ffu;
    float magnitude;
    if (exponent == 0) {
        magnitude = static_cast<float>(mantissa) * 0x1p-24f;  // zero and subnormals
    } else {
        const uint32_t bits = ((exponent + 112u) << 23) | (mantissa << 13);
        std::memcpy(&magnitude, &bits, sizeof magnitude);
    }
    uint32_t out;
    std::memcpy(&out, &magnitude, sizeof out);
    out |= sign;
    float f;
    std::memcpy(&f, &out, sizeof f);
    return f;
}

}  // namespace credence
