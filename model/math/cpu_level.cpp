#include "model/math/cpu_level.hpp"

#include <atomic>
#include <cstdlib>
#include <mutex>
#include <string_view>

#include "model/error.hpp"

// CMake defines CREDENCE_KERNEL_MAX_LEVEL as the highest level it compiled
// kernels for (0 on a compiler or CPU family without the x86-64 levels).
#ifndef CREDENCE_KERNEL_MAX_LEVEL
#define CREDENCE_KERNEL_MAX_LEVEL 0
#endif

namespace credence {

namespace {

CpuLevel probe() {
#if CREDENCE_KERNEL_MAX_LEVEL > 0 && defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__))
    // libgcc's probe checks the CPU's flags and that the operating system
    // saves the wide registers (XGETBV), as the psABI level definitions ask.
    __builtin_cpu_init();
    if (CREDENCE_KERNEL_MAX_LEVEL >= 2 && __builtin_cpu_supports("x86-64-v4")) return CpuLevel::v4;
    if (__builtin_cpu_supports("x86-64-v3")) return CpuLevel::v3;
#endif
    return CpuLevel::baseline;
}

bool parse_level(std::string_view text, CpuLevel& out) {
    for (CpuLevel l : {CpuLevel::baseline, CpuLevel::v3, CpuLevel::v4})
        if (text == cpu_level_name(l)) {
            out = l;
            return true;
        }
    return false;
}

// Written once under the call_once, then only by set_cpu_level.
struct Choice {
    std::once_flag once;
    std::atomic<int> level{0};
    bool capped = false;       // written once under `once`
    std::string error;         // non-empty: the variable was unusable; written once under `once`
};

Choice& choice() {
    static Choice c;
    return c;
}

void decide(Choice& c) {
    const CpuLevel detected = detected_cpu_level();
    CpuLevel level = detected;
    if (const char* text = std::getenv(kCpuLevelVariable); text && *text) {
        CpuLevel wanted;
        if (!parse_level(text, wanted)) {
            c.error = std::string(kCpuLevelVariable) + "='" + text +
                      "' names no CPU level; use x86-64, x86-64-v3 or x86-64-v4, or unset it";
        } else if (wanted > detected) {
            c.error = std::string(kCpuLevelVariable) + "=" + text + " is above what this CPU runs (" +
                      cpu_level_name(detected) + "); use a lower level or unset it";
        } else {
            c.capped = wanted < detected;
            level = wanted;
        }
    }
    c.level = static_cast<int>(level);
}

}  // namespace

const char* cpu_level_name(CpuLevel level) {
    switch (level) {
        case CpuLevel::baseline: return "x86-64";
        case CpuLevel::v3: return "x86-64-v3";
        case CpuLevel::v4: return "x86-64-v4";
    }
    return "x86-64";
}

CpuLevel detected_cpu_level() {
    static const CpuLevel level = probe();
    return level;
}

std::vector<CpuLevel> supported_cpu_levels() {
    std::vector<CpuLevel> out;
    for (int l = 0; l <= static_cast<int>(detected_cpu_level()); ++l) out.push_back(static_cast<CpuLevel>(l));
    return out;
}

CpuLevel active_cpu_level() {
    Choice& c = choice();
    std::call_once(c.once, [&c] { decide(c); });
    if (!c.error.empty()) throw OptionError(c.error);
    return static_cast<CpuLevel>(c.level.load(std::memory_order_relaxed));
}

void set_cpu_level(CpuLevel level) {
    if (level > detected_cpu_level())
        throw OptionError(std::string("CPU level ") + cpu_level_name(level) + " is above what this CPU runs (" +
                          cpu_level_name(detected_cpu_level()) + ")");
    Choice& c = choice();
    std::call_once(c.once, [&c] { decide(c); });
    c.level = static_cast<int>(level);
}

std::string cpu_level_description() {
    const CpuLevel level = active_cpu_level();
    std::string out = cpu_level_name(level);
    out += std::string(" (detected ") + cpu_level_name(detected_cpu_level());
    if (level < detected_cpu_level() && choice().capped) out += std::string(", capped by ") + kCpuLevelVariable;
    return out + ")";
}

}  // namespace credence
