// Storage for a side's factor rows ([rows][rank] float32), aligned to a
// 64-byte cache line so that a row of 16 floats is one line, not two: the
// row draws gather the other side's rows at random. Used by GibbsState
// (model/fit/gibbs_sweep.hpp) and the code that reads or moves its rows.
#pragma once
#include <cstddef>
#include <new>
#include <vector>

namespace credence {

// A standard allocator whose blocks start on a 64-byte boundary (C++17
// aligned operator new). Throws std::bad_alloc as operator new does.
template <typename T>
struct CacheLineAllocator {
    using value_type = T;
    static constexpr std::align_val_t kAlignment{64};

    CacheLineAllocator() = default;
    template <typename U>
    CacheLineAllocator(const CacheLineAllocator<U>&) noexcept {}

    T* allocate(std::size_t n) { return static_cast<T*>(::operator new(n * sizeof(T), kAlignment)); }
    void deallocate(T* p, std::size_t) noexcept { ::operator delete(p, kAlignment); }

    template <typename U>
    bool operator==(const CacheLineAllocator<U>&) const noexcept { return true; }
};

using FactorRows = std::vector<float, CacheLineAllocator<float>>;

}  // namespace credence
