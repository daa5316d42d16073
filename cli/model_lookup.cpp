#include "cli/model_lookup.hpp"

#include <fmt/format.h>

#include "model/error.hpp"

namespace credence::cli {

uint32_t find_index(const std::vector<std::string>& ids, const std::string& id, const char* kind) {
    for (uint32_t i = 0; i < ids.size(); ++i)
        if (ids[i] == id) return i;
    throw DataError(fmt::format("{} '{}' is not in the model (it has {} {}s)", kind, id, ids.size(), kind));
}

nlohmann::json prediction_json(const Prediction& p, double level) {
    return {{"mean", p.mean}, {"sd", p.sd}, {"lower", p.lower}, {"upper", p.upper}, {"level", level}};
}

}  // namespace credence::cli
