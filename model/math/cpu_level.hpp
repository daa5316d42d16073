// Which instruction-set level the hot kernels run at: the sampler's row
// draws (model/fit/row_kernels) and the screening dots (model/predict/
// screening_kernels) are compiled once per x86-64 micro-architecture level
// (psABI levels: baseline, v3 = AVX2+FMA, v4 = AVX-512) and chosen here at
// run time, so one portable binary uses the CPU it runs on.
#pragma once
#include <string>
#include <vector>

namespace credence {

// Ordered: a higher level runs everything a lower one does.
enum class CpuLevel : int {
    baseline = 0,  // x86-64 (SSE2), every x86-64 CPU
    v3 = 1,        // x86-64-v3: AVX2, FMA, BMI1/2 (2013 on)
    v4 = 2,        // x86-64-v4: AVX-512 F/BW/CD/DQ/VL
};

// The environment variable that caps the level ("x86-64", "x86-64-v3" or
// "x86-64-v4"): for tests and for users who want the portable kernels.
inline constexpr const char* kCpuLevelVariable = "CREDENCE_CPU_LEVEL";

// "x86-64", "x86-64-v3", "x86-64-v4".
const char* cpu_level_name(CpuLevel level);

// The highest level both this CPU (and its operating system) supports and
// this build compiled kernels for. Never throws.
CpuLevel detected_cpu_level();

// Every level from baseline up to detected_cpu_level(), ascending.
std::vector<CpuLevel> supported_cpu_levels();

// The level the kernels use now: detected_cpu_level(), lowered by
// CREDENCE_CPU_LEVEL when it is set (read on the first call), or what
// set_cpu_level chose. Throws OptionError on the first call when the
// variable names no level, or a level this CPU cannot run (later calls
// then throw the same). Thread-safe.
CpuLevel active_cpu_level();

// Chooses the level from here on (tests run every level this way). Throws
// OptionError for a level above detected_cpu_level(). Not for use while
// another thread runs a kernel (the change is atomic, but a sweep that
// straddles it mixes levels; results stay correct either way).
void set_cpu_level(CpuLevel level);

// "x86-64-v4 (detected x86-64-v4)" or "x86-64 (detected x86-64-v4, capped by
// CREDENCE_CPU_LEVEL)": what --version and the server's start-up log show.
// Throws like active_cpu_level().
std::string cpu_level_description();

}  // namespace credence
