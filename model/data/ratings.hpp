// The in-memory rating set: external string ids mapped to dense indices, and
// one compact record per kept rating. This is what ingest produces and what
// the sampler, evaluation and the posterior file consume.
#pragma once
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <unordered_map>
#include <vector>

namespace credence {

// Maps arbitrary external ids ("cust-0042", "SKU 19/B") to dense indices
// 0..size()-1 in order of first appearance. Owns copies of the strings.
class IdMap {
public:
    // Returns the index of `id`, adding it if new. Throws DataError when
    // the map already holds 2^32 - 1 ids (the data must be split).
    uint32_t intern(std::string_view id);
    // Returns the index of `id` or nullopt; never adds.
    std::optional<uint32_t> find(std::string_view id) const;
    const std::string& name(uint32_t index) const { return names_[index]; }
    const std::vector<std::string>& names() const { return names_; }
    size_t size() const { return names_.size(); }
    // Rebuilds a map from a list of unique names (e.g. read from a posterior
    // file, whose reader refuses repeated ids). Throws std::invalid_argument
    // for a repeated name: a bug in the caller.
    static IdMap from_names(std::vector<std::string> names);

private:
    struct Hash {
        using is_transparent = void;
        size_t operator()(std::string_view s) const noexcept { return std::hash<std::string_view>{}(s); }
    };
    std::vector<std::string> names_;
    std::unordered_map<std::string, uint32_t, Hash, std::equal_to<>> index_;
};

// One kept rating: 12 bytes. Indices refer to RatingSet::users / items.
struct Rating {
    uint32_t user;
    uint32_t item;
    float value;
};

// The closed interval ratings live on. `declared` is true when the user gave
// it (--scale); otherwise it is the observed min/max of the training data.
struct RatingScale {
    float min = 0.0f;
    float max = 0.0f;
    bool declared = false;
};

struct RatingSet {
    IdMap users;
    IdMap items;
    std::vector<Rating> ratings;
    RatingScale scale;

    size_t size() const { return ratings.size(); }
    double mean() const;
};

}  // namespace credence
