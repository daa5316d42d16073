// The product-mean baseline: what a model must beat to be worth serving.
// Each product's mean training rating (the training mean for a product with
// none), with the pooled sd of the training ratings around their product's
// mean as its spread, so a baseline prediction is Normal(mean_i, sd^2).
// fit_bpmf (model/fit/sampler.cpp) stores it in the fit metadata under
// "baseline"; evaluate (model/assess/evaluate.hpp) and fit --holdout score
// it beside the model. Comparing with a per-item mean is common practice.
#pragma once
#include <cstdint>
#include <optional>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/data/ratings.hpp"

namespace credence {

struct ProductMeanBaseline {
    double global_mean = 0.0;          // mean of every training rating
    double residual_sd = 0.0;          // pooled sd around the product means (rating units)
    std::vector<float> item_mean;      // [items of the training set's id map]
    std::vector<uint32_t> item_count;  // training ratings of each product
};

// Needs nothing: an empty set gives global mean 0 and every product mean 0.
// The residual sd divides by (ratings - products with ratings), at least 1.
ProductMeanBaseline product_mean_baseline(const RatingSet& train);

// {"kind": "product_mean", "global_mean", "residual_sd", "item_mean": [...],
//  "item_count": [...]}, item arrays in the training set's item order.
nlohmann::json to_json(const ProductMeanBaseline& baseline);

// What to_json wrote, for a model with `items` products; nullopt when `j` is
// not such an object or its arrays are not `items` long (a file written
// before the baseline was stored, or by another program).
std::optional<ProductMeanBaseline> baseline_from_json(const nlohmann::json& j, size_t items);

}  // namespace credence
