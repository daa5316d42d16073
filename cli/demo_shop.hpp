// The demo scenario: Thimbleford Goods, an invented small online shop selling
// loose-leaf tea, paper goods, candles and kitchenware. Generates its
// catalogue, its customers and their star ratings from a hidden low-rank
// taste model, so that a fit has real structure to find. Everything here is
// invented; no real shop, brand or person.
#pragma once
#include <cstdint>
#include <string>

namespace credence::cli {

struct DemoShopOptions {
    uint32_t customers = 1500;
    uint32_t products = 400;
    uint64_t seed = 2026;
    bool include_faulty_rows = true;  // a few malformed rows, to show the rejects file
};

struct DemoShopFiles {
    std::string ratings_path;   // customer_id,product_sku,stars,rated_at
    std::string catalogue_path; // product_sku,name,category
    uint64_t ratings_written = 0;
};

// Writes ratings.csv and catalogue.csv into `directory` (created if missing).
// Throws FileError if the folder cannot be created or a file cannot be written.
DemoShopFiles write_demo_shop(const std::string& directory, const DemoShopOptions& options);

}  // namespace credence::cli
