// Compressed sparse row layouts of a rating set: one by user (row = user,
// index = item) and one by item (row = item, index = user). Each costs
// 8 bytes per rating (u32 index + f32 value) plus 8 bytes per row.
#pragma once
#include <cstdint>
#include <vector>

#include "model/data/ratings.hpp"

namespace credence {

struct CsrMatrix {
    uint32_t num_rows = 0;
    uint32_t num_cols = 0;
    std::vector<uint64_t> offsets;  // [num_rows + 1]
    std::vector<uint32_t> index;    // [nnz], ascending within a row
    std::vector<float> value;       // [nnz]

    uint64_t nnz() const { return index.size(); }
    uint64_t row_size(uint32_t r) const { return offsets[r + 1] - offsets[r]; }
    uint64_t max_row_size() const;
};

// Builds the layout by counting sort, then sorts any row whose indices are
// out of order. Needs every rating's user < users.size() and item <
// items.size(); throws std::invalid_argument otherwise. Duplicate pairs are
// kept (callers that need uniqueness check has_duplicates).
CsrMatrix csr_by_user(const RatingSet& ratings);
CsrMatrix csr_by_item(const RatingSet& ratings);

// True if some row holds the same index twice.
bool has_duplicates(const CsrMatrix& csr);

}  // namespace credence
