// Seeded train/validation splits of a RatingSet, mapping a separately
// ingested rating file onto a training set's ids, and writing held-out
// ratings back out as a CSV file that ingest reads (fit --holdout-out, for
// evaluate and report --validation).
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include "model/data/ratings.hpp"

namespace credence {

struct HoldoutSplit {
    RatingSet train;                 // same id maps and scale as the input; order preserved (sorted stays sorted)
    std::vector<Rating> test;        // indices refer to train's id maps; input order
};

// Moves exactly round(fraction * N) ratings, chosen uniformly by a partial
// Fisher-Yates shuffle keyed by (seed, StreamBlock::split), to the test side.
// Needs 0 <= fraction < 1; throws std::invalid_argument otherwise. Takes the
// set by value: pass an rvalue to split without a copy. Users or items whose ratings all land in validation stay in the
// id maps (the sampler draws them from the population prior).
HoldoutSplit split_holdout(RatingSet all, double fraction, uint64_t seed);

struct MappedRatings {
    std::vector<Rating> ratings;     // pairs whose user and item are both known, in reference indices
    uint64_t unknown_user_pairs = 0; // pairs dropped because the user is unknown
    uint64_t unknown_item_pairs = 0; // ... the item is unknown (user known)
};

// Re-expresses `other`'s ratings in `reference`'s id space by external id.
MappedRatings map_onto(const RatingSet& other, const IdMap& reference_users, const IdMap& reference_items);

// Writes `ratings` (indices into `users` and `items`) to `path` as CSV with
// the header customer,product,rating: ids quoted as RFC 4180 says when they
// hold a comma, quote, line break or surrounding blanks; each rating in the
// shortest text that reads back as the same float. Written to a temporary
// file renamed over `path`. Throws FileError naming the path when it cannot
// be written; std::out_of_range for an index beyond the maps (a bug).
void write_ratings_csv(const std::vector<Rating>& ratings, const IdMap& users, const IdMap& items,
                       const std::string& path);

}  // namespace credence
