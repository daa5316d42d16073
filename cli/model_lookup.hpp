// Small helpers the query subcommands (predict, recommend) share: external id
// to model index, and one prediction as JSON.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include <nlohmann/json.hpp>

#include "model/predict/predict.hpp"

namespace credence::cli {

// The index of `id` in `ids`. Throws DataError naming the kind ("user",
// "item") and how many the model has when `id` is absent.
uint32_t find_index(const std::vector<std::string>& ids, const std::string& id, const char* kind);

// {"mean", "sd", "lower", "upper", "level"} of one prediction.
nlohmann::json prediction_json(const Prediction& p, double level);

}  // namespace credence::cli
