#include "model/data/ratings.hpp"

#include <stdexcept>

#include "model/error.hpp"

namespace credence {

uint32_t IdMap::intern(std::string_view id) {
    auto it = index_.find(id);
    if (it != index_.end()) return it->second;
    if (names_.size() >= UINT32_MAX)
        throw DataError("more than 4 billion distinct user or item ids; split the ratings file");
    const auto index = static_cast<uint32_t>(names_.size());
    names_.emplace_back(id);
    index_.emplace(names_.back(), index);
    return index;
}

std::optional<uint32_t> IdMap::find(std::string_view id) const {
    auto it = index_.find(id);
    if (it == index_.end()) return std::nullopt;
    return it->second;
}

IdMap IdMap::from_names(std::vector<std::string> names) {
    IdMap map;
    map.names_ = std::move(names);
    map.index_.reserve(map.names_.size());
    for (uint32_t i = 0; i < map.names_.size(); ++i) {
        if (!map.index_.emplace(map.names_[i], i).second)
            throw std::invalid_argument("duplicate id in id list: '" + map.names_[i] + "'");
    }
    return map;
}

double RatingSet::mean() const {
    if (ratings.empty()) return 0.0;
    double sum = 0.0;
    for (const auto& r : ratings) sum += r.value;
    return sum / static_cast<double>(ratings.size());
}

}  // namespace credence
