// Rating ingest: a CSV/TSV export in, a validated RatingSet out, and nothing
// lost silently. Every row read is either kept, rejected (written to the
// rejects file with its line number and reason) or merged into another row
// by the duplicate policy; the summary's counts add up to rows read.
#pragma once
#include <cstdint>
#include <functional>
#include <optional>
#include <string>

#include "model/ratings.hpp"

namespace credence {

enum class DuplicatePolicy {
    latest,  // the row with the largest timestamp wins (file order breaks ties and stands in without a timestamp column)
    mean,    // the ratings are averaged
};

struct IngestOptions {
    std::string path;                   // file to read; "-" is standard input
    std::optional<char> delimiter;      // nullopt: detect from the first line (',', '\t', ';' or '|')
    std::optional<bool> has_header;     // nullopt: detect (first row has a non-numeric rating field)
    // Columns by header name or by 0-based index given as digits ("0", "2").
    // Defaults: the first header name that matches user/customer/..., item/product/..., rating/score/...,
    // or indices 0, 1, 2 without a header.
    std::string user_column;
    std::string item_column;
    std::string rating_column;
    std::string timestamp_column;       // empty: none (detected by name "timestamp"/"time"/"date" if present)
    std::optional<RatingScale> scale;   // declared scale: ratings outside are rejected
    DuplicatePolicy duplicates = DuplicatePolicy::latest;
    double max_reject_fraction = 0.01;  // above this the ingest throws DataError
    std::string rejects_path;           // empty: "<path>.rejects.tsv" when any row is rejected ("-" input: none)
    // Called now and then with bytes consumed so far and total (0 if unknown).
    std::function<void(uint64_t bytes_done, uint64_t bytes_total)> progress;
};

struct IngestSummary {
    uint64_t rows_read = 0;        // data rows (header excluded, blank lines excluded)
    uint64_t kept = 0;             // ratings in the result
    uint64_t rejected = 0;         // rows written to the rejects file
    uint64_t merged_duplicates = 0;// rows folded into another by the duplicate policy
    uint64_t blank_lines = 0;      // skipped, not counted as rows
    std::string rejects_path;      // where rejects went ("" if none)
    char delimiter = ',';
    bool had_header = false;
    std::string fingerprint;       // xxh3-64 hex of the file bytes, for the posterior's metadata
    // rows_read == kept + rejected + merged_duplicates always holds.
};

struct IngestResult {
    RatingSet ratings;
    IngestSummary summary;
};

// Reads the file in a streaming pass. Throws DataError when the file cannot be
// read, a named column does not exist, nothing is kept, or the reject fraction
// exceeds max_reject_fraction (the message gives counts and the rejects path).
// Ratings in the result are sorted by (user, item) and unique.
IngestResult ingest_ratings(const IngestOptions& options);

// Human summary, one line: "read 1000 rows: kept 990, rejected 4, merged 6 duplicates (rejects in x.rejects.tsv)".
std::string describe(const IngestSummary& summary);

}  // namespace credence
