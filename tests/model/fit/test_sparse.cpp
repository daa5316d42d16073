// Tests for model/sparse: both CSR layouts hold exactly the ratings, rows
// sorted, whatever the input order.
#include <catch2/catch.hpp>

#include <algorithm>
#include <type_traits>

#include "model/fit/sparse.hpp"

using namespace credence;

namespace {
RatingSet small_shop() {
    // Three customers, four products, given out of order.
    RatingSet rs;
    for (auto id : {"customer-ada", "customer-bo", "customer-cy"}) rs.users.intern(id);
    for (auto id : {"lamp", "kettle", "rug", "mug"}) rs.items.intern(id);
    rs.ratings = {{2, 3, 1.5f}, {0, 2, 4.0f}, {0, 0, 5.0f}, {1, 2, 2.0f}, {2, 0, 3.5f}, {0, 1, 1.0f}};
    return rs;
}
}  // namespace

TEST_CASE("CSR by user and by item hold each rating once, sorted within rows") {
    const RatingSet rs = small_shop();
    const CsrMatrix u = csr_by_user(rs);
    CHECK(u.num_rows == 3);
    CHECK(u.num_cols == 4);
    CHECK(u.offsets == std::vector<uint64_t>{0, 3, 4, 6});
    CHECK(u.index == std::vector<uint32_t>{0, 1, 2, 2, 0, 3});
    CHECK(u.value == std::vector<float>{5.0f, 1.0f, 4.0f, 2.0f, 3.5f, 1.5f});
    CHECK(u.max_row_size() == 3);

    const CsrMatrix i = csr_by_item(rs);
    CHECK(i.num_rows == 4);
    CHECK(i.num_cols == 3);
    CHECK(i.offsets == std::vector<uint64_t>{0, 2, 3, 5, 6});
    CHECK(i.index == std::vector<uint32_t>{0, 2, 0, 0, 1, 2});
    CHECK(i.value == std::vector<float>{5.0f, 3.5f, 1.0f, 4.0f, 2.0f, 1.5f});
    CHECK_FALSE(has_duplicates(u));
    CHECK_FALSE(has_duplicates(i));
}

TEST_CASE("CSR storage is 8 bytes per rating per side") {
    // u32 index + f32 value per rating (the memory budget of the sampler).
    STATIC_REQUIRE(sizeof(CsrMatrix::index.front()) + sizeof(CsrMatrix::value.front()) == 8);
    const RatingSet rs = small_shop();
    const CsrMatrix u = csr_by_user(rs);
    CHECK(u.index.size() * sizeof(uint32_t) + u.value.size() * sizeof(float) == 8 * rs.size());
}

TEST_CASE("rows with no ratings are empty, duplicates are detected, bad indices rejected") {
    RatingSet rs = small_shop();
    rs.items.intern("unrated-vase");
    const CsrMatrix i = csr_by_item(rs);
    CHECK(i.num_rows == 5);
    CHECK(i.row_size(4) == 0);
    rs.ratings.push_back({1, 2, 3.0f});
    CHECK(has_duplicates(csr_by_user(rs)));
    CHECK(has_duplicates(csr_by_item(rs)));
    rs.ratings.push_back({7, 0, 3.0f});
    CHECK_THROWS_AS(csr_by_user(rs), std::invalid_argument);
}
