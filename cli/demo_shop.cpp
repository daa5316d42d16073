#include "cli/demo_shop.hpp"

#include <algorithm>
#include <array>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <system_error>
#include <vector>

#include <fmt/format.h>

#include "model/error.hpp"
#include "model/math/random.hpp"

namespace credence::cli {

namespace {

struct Category {
    const char* slug;
    const char* label;
    std::array<const char*, 12> first;
    std::array<const char*, 10> second;
};

// Invented product names: two word lists per category, combined. Plain
// descriptive or invented words; none is, or resembles, a brand or trademark.
const std::array<Category, 4> kCategories = {{
    {"tea", "loose-leaf tea",
     {"Harbor Fog", "Quince Blossom", "Slow Roast", "Lantern", "Mossbank", "Saltmarsh", "Wrenholt",
      "Winter Orchard", "Hollow Hill", "River Stone", "Cinder", "Fieldfare"},
     {"Oolong", "Green", "Black", "White", "Rooibos", "Chai", "Breakfast Blend", "Herbal", "Smoked Black", "Jasmine"}},
    {"paper", "paper goods",
     {"Thistle", "Quarry", "Ink Pot", "Marsh Wren", "Slate", "Beacon", "Foxglove", "Tidewater", "Stonechat",
      "Sloe", "Larch", "Shingle"},
     {"Notebook A5", "Sketchbook", "Pocket Journal", "Letter Set", "Weekly Planner", "Index Cards",
      "Ruled Jotter", "Dot Grid Pad", "Recipe Book", "Postcard Pack"}},
    {"candle", "candles",
     {"Bonfire", "Sea Lavender", "Cedar Loft", "Rain on Slate", "Orchard Smoke", "Wool Blanket", "Evening Stock",
      "Green Fig", "Peat Fire", "Meadowsweet", "Tallow Lane", "Marram Grass"},
     {"Jar Candle", "Tin Candle", "Taper Pair", "Pillar", "Tealights", "Wax Melt", "Travel Tin", "Votive",
      "Wick Trio", "Reed Diffuser"}},
    {"kitchen", "kitchenware",
     {"Stoneware", "Oak", "Enamel", "Linen", "Cast Iron", "Copper", "Glazed", "Beechwood", "Speckled", "Ash",
      "Terracotta", "Walnut"},
     {"Mug", "Teapot", "Cutting Board", "Apron", "Skillet", "Bowl Set", "Tea Strainer", "Spoon Set",
      "Butter Dish", "Tea Tin"}},
}};

constexpr int kTasteRank = 4;

std::string csv_field(const std::string& s) {
    if (s.find_first_of(",\"\n") == std::string::npos) return s;
    std::string q = "\"";
    for (char c : s) q += c == '"' ? std::string("\"\"") : std::string(1, c);
    return q + "\"";
}

// The invented catalogue: each product has a category, a popularity and a
// taste vector that leans towards its category's axis. Draws from `rng` (the
// same draws in the same order as ever, so the demo's files do not change).
struct DemoProduct {
    std::string sku, name;
    int category;
    double popularity, bias;
    std::array<double, kTasteRank> taste;
};

std::vector<DemoProduct> invent_catalogue(const DemoShopOptions& o, Rng& rng) {
    std::vector<DemoProduct> products;
    std::vector<std::string> used;
    for (uint32_t p = 0; p < o.products; ++p) {
        const int c = static_cast<int>(p % kCategories.size());
        const auto& cat = kCategories[c];
        std::string name = fmt::format("{} {}", cat.first[rng.below(cat.first.size())], cat.second[rng.below(cat.second.size())]);
        const auto repeats = std::count(used.begin(), used.end(), name);
        used.push_back(name);
        if (repeats > 0) name += fmt::format(" No. {}", repeats + 1);
        DemoProduct prod;
        prod.sku = fmt::format("{}-{:04d}", cat.slug, p / kCategories.size() + 1);
        prod.name = name;
        prod.category = c;
        prod.popularity = std::pow(static_cast<double>(p + 1), -0.8);  // Zipf-like, common practice for catalogues
        prod.bias = 0.35 * rng.normal();
        for (int k = 0; k < kTasteRank; ++k) prod.taste[k] = 0.45 * rng.normal() + (k == c ? 0.6 : 0.0);
        products.push_back(std::move(prod));
    }
    // Shuffle popularity across categories so every aisle has hits.
    for (size_t p = products.size(); p > 1; --p) std::swap(products[p - 1].popularity, products[rng.below(p)].popularity);

    return products;
}

}  // namespace

DemoShopFiles write_demo_shop(const std::string& directory, const DemoShopOptions& o) {
    namespace fs = std::filesystem;
    std::error_code ec;
    fs::create_directories(directory, ec);
    if (ec) throw FileError("cannot create the folder " + directory + ": " + ec.message() + "; check the path");
    Rng rng = Rng::keyed(o.seed, 0, 0, StreamBlock::simulate, 0);

    const std::vector<DemoProduct> products = invent_catalogue(o, rng);

    std::vector<double> cumulative(products.size());
    double acc = 0;
    for (size_t p = 0; p < products.size(); ++p) cumulative[p] = (acc += products[p].popularity);

    DemoShopFiles files;
    files.catalogue_path = (fs::path(directory) / "catalogue.csv").string();
    files.ratings_path = (fs::path(directory) / "ratings.csv").string();
    {
        std::ofstream cat(files.catalogue_path);
        cat << "product_sku,name,category\n";
        for (const auto& p : products) cat << p.sku << ',' << csv_field(p.name) << ',' << kCategories[p.category].label << '\n';
        if (!cat) throw FileError("could not write " + files.catalogue_path);
    }

    std::ofstream out(files.ratings_path);
    out << "customer_id,product_sku,stars,rated_at\n";
    int64_t clock = 1767225600;  // 2026-01-01T00:00:00Z
    std::vector<char> seen(products.size());
    for (uint32_t c = 0; c < o.customers; ++c) {
        const std::string customer = fmt::format("c-{:05d}", c + 1);
        std::array<double, kTasteRank> taste;
        const int favourite = static_cast<int>(rng.below(kCategories.size()));
        for (int k = 0; k < kTasteRank; ++k) taste[k] = 0.5 * rng.normal() + (k == favourite ? 0.7 : 0.0);
        const double generosity = 0.4 * rng.normal();
        // Ratings per customer: log-normal around 12, at least 3.
        const auto count = std::clamp<int>(static_cast<int>(std::exp(std::log(12.0) + 0.8 * rng.normal())), 3,
                                           static_cast<int>(products.size() / 2));
        std::fill(seen.begin(), seen.end(), 0);
        for (int r = 0; r < count; ++r) {
            const double x = rng.uniform() * acc;
            auto p = static_cast<size_t>(std::lower_bound(cumulative.begin(), cumulative.end(), x) - cumulative.begin());
            p = std::min(p, products.size() - 1);
            if (seen[p]) continue;
            seen[p] = 1;
            double affinity = 0;
            for (int k = 0; k < kTasteRank; ++k) affinity += taste[k] * products[p].taste[k];
            const double latent = 3.5 + generosity + products[p].bias + 1.2 * affinity + 0.6 * rng.normal();
            const int stars = std::clamp(static_cast<int>(std::lround(latent)), 1, 5);
            clock += 1 + static_cast<int64_t>(rng.below(5000));
            out << customer << ',' << products[p].sku << ',' << stars << ',' << clock << '\n';
            ++files.ratings_written;
            // Now and then a customer revises a rating later: a duplicate pair for the ingest policy.
            if (rng.uniform() < 0.01) {
                clock += 86400;
                out << customer << ',' << products[p].sku << ',' << std::clamp(stars + (rng.uniform() < 0.5 ? -1 : 1), 1, 5)
                    << ',' << clock << '\n';
                ++files.ratings_written;
            }
        }
        if (o.include_faulty_rows && c == o.customers / 3) {
            // What real exports contain: a missing rating, a typo, an empty id.
            out << customer << ",paper-0003,,1767999999\n";
            out << customer << ",candle-0002,four,1767999999\n";
            out << ",tea-0001,5,1767999999\n";
            files.ratings_written += 3;
        }
    }
    if (!out) throw FileError("could not write " + files.ratings_path);
    return files;
}

}  // namespace credence::cli
