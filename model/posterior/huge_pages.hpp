// Sizing a large array so that the kernel backs it with huge pages where it
// grants them. Used for the posterior's arrays (model/posterior/posterior_file.cpp)
// and the screening pass's half-precision copy (model/predict/screening.cpp).
#pragma once
#include <cstddef>
#include <cstdint>
#include <vector>

#include <sys/mman.h>

namespace credence {

// Sizes `out` to `count` elements, asking the kernel first to back its
// whole 2 MiB stretches with huge pages (transparent huge pages, where the
// system grants them on request). Serving reads rows scattered over every
// sample's block, each in another 4 KiB page: with small pages every such
// read also misses the TLB. Only advice: without it (or where it is refused)
// the memory and its contents are the same. Arrays under 4 MiB, or already
// that large, are only resized. Throws std::bad_alloc as resize does.
template <typename T>
void size_for_reading(std::vector<T>& out, size_t count) {
    constexpr uintptr_t kHugePageBytes = uintptr_t(2) << 20;
    if (count * sizeof(T) >= 2 * kHugePageBytes && out.capacity() < count) {
        std::vector<T>().swap(out);
        out.reserve(count);  // allocated, not yet touched: the advice covers the first touch
        const auto at = reinterpret_cast<uintptr_t>(out.data());
        const uintptr_t begin = (at + kHugePageBytes - 1) & ~(kHugePageBytes - 1);
        const uintptr_t end = (at + count * sizeof(T)) & ~(kHugePageBytes - 1);
        if (end > begin) ::madvise(reinterpret_cast<void*>(begin), end - begin, MADV_HUGEPAGE);
    }
    out.resize(count);
}

}  // namespace credence
