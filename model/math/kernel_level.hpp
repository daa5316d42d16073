// The per-level frame of the kernel files (model/fit/row_kernels.cpp,
// model/predict/screening_kernels.cpp): which level a compilation is for,
// its table's name, and the run-time pick of a table. Levels: cpu_level.hpp.
//
// CMake compiles each kernel file once per level with CREDENCE_KERNEL_LEVEL
// 0, 1 or 2 (and CREDENCE_KERNEL_MAX_LEVEL, the highest it compiles), above
// the baseline with -march for that level. So that no out-of-line code built
// for one level can be linked into another's callers (scripts/check-kernel-
// objects), this header holds macros only, and the one function they define,
// table_for, exists in the baseline compilation alone.
#pragma once

#ifndef CREDENCE_KERNEL_LEVEL
#define CREDENCE_KERNEL_LEVEL 0
#endif

#if CREDENCE_KERNEL_LEVEL > 0
#include <immintrin.h>
#else
#include <stdexcept>
#include <string>
#endif

// Forces a kernel helper inline: it keeps no out-of-line copy to share.
#define CREDENCE_INLINE inline __attribute__((always_inline))

// The name of this compilation's table (declared in each kernel file's
// header as table_baseline, table_v3 and table_v4) and the cpu_level_name of
// its level, which the table records.
#if CREDENCE_KERNEL_LEVEL == 2
#define CREDENCE_KERNEL_TABLE table_v4
#define CREDENCE_KERNEL_LEVEL_NAME "x86-64-v4"
#elif CREDENCE_KERNEL_LEVEL == 1
#define CREDENCE_KERNEL_TABLE table_v3
#define CREDENCE_KERNEL_LEVEL_NAME "x86-64-v3"
#else
#define CREDENCE_KERNEL_TABLE table_baseline
#define CREDENCE_KERNEL_LEVEL_NAME "x86-64"
#endif

// The switch cases of the levels above the baseline that this build compiled.
#if CREDENCE_KERNEL_MAX_LEVEL >= 1
#define CREDENCE_KERNEL_CASE_V3 \
    case 1: return table_v3;
#else
#define CREDENCE_KERNEL_CASE_V3
#endif
#if CREDENCE_KERNEL_MAX_LEVEL >= 2
#define CREDENCE_KERNEL_CASE_V4 \
    case 2: return table_v4;
#else
#define CREDENCE_KERNEL_CASE_V4
#endif

// Defines, in the kernel file's namespace, `const Table& table_for(CpuLevel
// level)`: the table of `level`, std::invalid_argument naming `kernels` (a
// string literal such as "row kernels") for a level this build did not
// compile. Expands to that definition in the baseline compilation, which
// every CPU runs, and to nothing in the others.
#if CREDENCE_KERNEL_LEVEL == 0
#define CREDENCE_KERNEL_TABLE_FOR(kernels)                                                \
    const Table& table_for(CpuLevel level) {                                              \
        switch (static_cast<int>(level)) {                                                \
            case 0: return table_baseline;                                                \
            CREDENCE_KERNEL_CASE_V3                                                       \
            CREDENCE_KERNEL_CASE_V4                                                       \
            default: break;                                                               \
        }                                                                                 \
        throw std::invalid_argument(kernels ": no table for CPU level " +                 \
                                    std::to_string(static_cast<int>(level)));             \
    }
#else
#define CREDENCE_KERNEL_TABLE_FOR(kernels)
#endif
