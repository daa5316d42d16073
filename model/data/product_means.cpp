#include "model/data/product_means.hpp"

#include <algorithm>
#include <cmath>

namespace credence {

ProductMeanBaseline product_mean_baseline(const RatingSet& train) {
    ProductMeanBaseline b;
    const size_t items = train.items.size();
    std::vector<double> sum(items, 0.0);
    b.item_count.assign(items, 0);
    for (const Rating& r : train.ratings) {
        sum[r.item] += r.value;
        ++b.item_count[r.item];
    }
    b.global_mean = train.mean();
    b.item_mean.resize(items);
    size_t rated_items = 0;
    for (size_t i = 0; i < items; ++i) {
        rated_items += b.item_count[i] > 0;
        b.item_mean[i] = static_cast<float>(b.item_count[i] ? sum[i] / b.item_count[i] : b.global_mean);
    }
    double ss = 0.0;
    for (const Rating& r : train.ratings) ss += std::pow(double(r.value) - b.item_mean[r.item], 2);
    const double dof = std::max<double>(1.0, double(train.ratings.size()) - double(rated_items));
    b.residual_sd = std::sqrt(ss / dof);
    return b;
}

nlohmann::json to_json(const ProductMeanBaseline& b) {
    return {{"kind", "product_mean"},
            {"global_mean", b.global_mean},
            {"residual_sd", b.residual_sd},
            {"item_mean", b.item_mean},
            {"item_count", b.item_count}};
}

std::optional<ProductMeanBaseline> baseline_from_json(const nlohmann::json& j, size_t items) {
    if (!j.is_object() || j.value("kind", "") != "product_mean") return std::nullopt;
    try {
        ProductMeanBaseline b;
        b.global_mean = j.at("global_mean").get<double>();
        b.residual_sd = j.at("residual_sd").get<double>();
        b.item_mean = j.at("item_mean").get<std::vector<float>>();
        b.item_count = j.at("item_count").get<std::vector<uint32_t>>();
        if (b.item_mean.size() != items || b.item_count.size() != items) return std::nullopt;
        if (!std::isfinite(b.residual_sd) || !(b.residual_sd > 0.0)) return std::nullopt;
        return b;
    } catch (const nlohmann::json::exception&) {
        return std::nullopt;
    }
}

}  // namespace credence
