#include "model/fit/sparse.hpp"

#include <algorithm>
#include <numeric>
#include <stdexcept>
#include <string>

namespace credence {

uint64_t CsrMatrix::max_row_size() const {
    uint64_t m = 0;
    for (uint32_t r = 0; r < num_rows; ++r) m = std::max(m, row_size(r));
    return m;
}

namespace {

template <bool ByUser>
CsrMatrix build(const RatingSet& rs) {
    CsrMatrix m;
    m.num_rows = static_cast<uint32_t>(ByUser ? rs.users.size() : rs.items.size());
    m.num_cols = static_cast<uint32_t>(ByUser ? rs.items.size() : rs.users.size());
    m.offsets.assign(static_cast<size_t>(m.num_rows) + 1, 0);
    for (size_t j = 0; j < rs.ratings.size(); ++j) {
        const auto& r = rs.ratings[j];
        if (r.user >= rs.users.size() || r.item >= rs.items.size())
            throw std::invalid_argument("rating " + std::to_string(j) + " refers to user " + std::to_string(r.user) +
                                        ", item " + std::to_string(r.item) + " beyond the id maps");
        ++m.offsets[(ByUser ? r.user : r.item) + 1];
    }
    std::partial_sum(m.offsets.begin(), m.offsets.end(), m.offsets.begin());
    m.index.resize(rs.ratings.size());
    m.value.resize(rs.ratings.size());
    std::vector<uint64_t> fill(m.offsets.begin(), m.offsets.end() - 1);
    for (const auto& r : rs.ratings) {
        const uint64_t p = fill[ByUser ? r.user : r.item]++;
        m.index[p] = ByUser ? r.item : r.user;
        m.value[p] = r.value;
    }
    // Rows come out sorted when the input is sorted by (user, item); fix any that are not.
    std::vector<std::pair<uint32_t, float>> tmp;
    for (uint32_t row = 0; row < m.num_rows; ++row) {
        const uint64_t b = m.offsets[row], e = m.offsets[row + 1];
        if (std::is_sorted(m.index.begin() + b, m.index.begin() + e)) continue;
        tmp.clear();
        for (uint64_t p = b; p < e; ++p) tmp.emplace_back(m.index[p], m.value[p]);
        std::stable_sort(tmp.begin(), tmp.end(), [](auto& x, auto& y) { return x.first < y.first; });
        for (uint64_t p = b; p < e; ++p) std::tie(m.index[p], m.value[p]) = tmp[p - b];
    }
    return m;
}

}  // namespace

CsrMatrix csr_by_user(const RatingSet& ratings) { return build<true>(ratings); }
CsrMatrix csr_by_item(const RatingSet& ratings) { return build<false>(ratings); }

bool has_duplicates(const CsrMatrix& csr) {
    for (uint32_t row = 0; row < csr.num_rows; ++row)
        for (uint64_t p = csr.offsets[row] + 1; p < csr.offsets[row + 1]; ++p)
            if (csr.index[p] == csr.index[p - 1]) return true;
    return false;
}

}  // namespace credence
