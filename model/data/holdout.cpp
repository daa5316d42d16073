#include "model/data/holdout.hpp"

#include <cerrno>
#include <charconv>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <numeric>
#include <stdexcept>
#include <string>

#include "model/error.hpp"
#include "model/math/random.hpp"

namespace credence {

HoldoutSplit split_holdout(RatingSet all, double fraction, uint64_t seed) {
    if (!(fraction >= 0.0 && fraction < 1.0))
        throw std::invalid_argument("holdout fraction must be at least 0 and below 1, not " + std::to_string(fraction));
    const size_t n = all.ratings.size();
    const auto n_out = static_cast<size_t>(std::llround(fraction * static_cast<double>(n)));
    // Partial Fisher-Yates over indices: the first n_out positions are the holdout.
    std::vector<uint32_t> order(n);
    std::iota(order.begin(), order.end(), 0u);
    Rng rng = Rng::keyed(seed, 0, 0, StreamBlock::split, 0);
    for (size_t k = 0; k < n_out; ++k) {
        const size_t j = k + rng.below(n - k);
        std::swap(order[k], order[j]);
    }
    std::vector<char> held(n, 0);
    for (size_t k = 0; k < n_out; ++k) held[order[k]] = 1;
    order.clear();
    order.shrink_to_fit();

    HoldoutSplit split;
    split.test.reserve(n_out);
    size_t w = 0;
    for (size_t r = 0; r < n; ++r) {
        if (held[r]) split.test.push_back(all.ratings[r]);
        else all.ratings[w++] = all.ratings[r];
    }
    all.ratings.resize(w);
    all.ratings.shrink_to_fit();
    split.train = std::move(all);
    return split;
}

MappedRatings map_onto(const RatingSet& other, const IdMap& reference_users, const IdMap& reference_items) {
    // Translate each distinct id once, not once per rating.
    constexpr uint32_t kUnknown = UINT32_MAX;
    std::vector<uint32_t> user_map(other.users.size()), item_map(other.items.size());
    for (uint32_t u = 0; u < user_map.size(); ++u) user_map[u] = reference_users.find(other.users.name(u)).value_or(kUnknown);
    for (uint32_t i = 0; i < item_map.size(); ++i) item_map[i] = reference_items.find(other.items.name(i)).value_or(kUnknown);
    MappedRatings out;
    out.ratings.reserve(other.ratings.size());
    for (const auto& r : other.ratings) {
        const uint32_t u = user_map[r.user], i = item_map[r.item];
        if (u == kUnknown) ++out.unknown_user_pairs;
        else if (i == kUnknown) ++out.unknown_item_pairs;
        else out.ratings.push_back({u, i, r.value});
    }
    return out;
}

namespace {

void append_csv_field(std::string& line, const std::string& field) {
    const bool quote = field.find_first_of(",\"\r\n") != std::string::npos || field.empty() ||
                       field.front() == ' ' || field.front() == '\t' || field.back() == ' ' || field.back() == '\t';
    if (!quote) {
        line += field;
        return;
    }
    line += '"';
    for (char c : field) {
        if (c == '"') line += '"';
        line += c;
    }
    line += '"';
}

}  // namespace

void write_ratings_csv(const std::vector<Rating>& ratings, const IdMap& users, const IdMap& items,
                       const std::string& path) {
    const std::string tmp = path + ".tmp";
    std::FILE* f = std::fopen(tmp.c_str(), "wb");
    if (!f) throw FileError("cannot write " + path + ": " + std::strerror(errno) + "; check the folder exists and is writable");
    std::string line = "customer,product,rating\n";
    bool ok = std::fwrite(line.data(), 1, line.size(), f) == line.size();
    for (const Rating& r : ratings) {
        line.clear();
        append_csv_field(line, users.names().at(r.user));
        line += ',';
        append_csv_field(line, items.names().at(r.item));
        line += ',';
        char number[32];
        const auto [end, ec] = std::to_chars(number, number + sizeof number, r.value);
        line.append(number, ec == std::errc() ? end : number);
        line += '\n';
        ok = ok && std::fwrite(line.data(), 1, line.size(), f) == line.size();
    }
    ok = std::fclose(f) == 0 && ok;
    std::error_code ec;
    if (ok) std::filesystem::rename(tmp, path, ec);
    if (!ok || ec) {
        std::filesystem::remove(tmp, ec);
        throw FileError("cannot write " + path + "; check the disk and the folder's permissions");
    }
}

}  // namespace credence
