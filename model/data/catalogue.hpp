// The shop's catalogue: product id, name and optional category, read from a
// CSV/TSV file (fit --catalogue) so answers can show a name beside each id.
// Used by cli/fit_command; format and reject accounting as model/data/ingest.hpp.
#pragma once
#include <cstdint>
#include <string>
#include <unordered_map>

#include "model/data/ingest.hpp"

namespace credence {

struct CatalogueEntry {
    std::string name;
    std::string category;  // "" when the file has no category column or the field is empty
};

struct Catalogue {
    std::unordered_map<std::string, CatalogueEntry> products;  // product id -> entry
    // rows_read == kept + rejected + merged_duplicates (an exact repeat of a
    // row already kept is merged; a repeat with another name or category is
    // rejected, the first one stands).
    IngestSummary summary;
};

struct CatalogueOptions {
    std::string path;
    double max_reject_fraction = 0.01;  // in [0, 1]; above it DataError
    std::string rejects_path;           // empty: "<path>.rejects.tsv" when any row is rejected
};

// Reads the catalogue. Columns: with a header (detected when the first row
// has a field named like "name"), the columns named name, category and the
// first other column as the product id; without one, id, name, category in
// that order. Blank lines are skipped and counted (summary.blank_lines).
// A row is rejected (line and reason in the rejects file, TSV
// "line<TAB>reason<TAB>record") when it is malformed CSV, has fewer than 2
// fields, an empty id or name, or repeats an id with other values.
// Throws OptionError for max_reject_fraction outside [0, 1]; FileError when
// the file or the rejects file cannot be opened, read or written, or when the
// rejects path names an existing file that is not a rejects file (see
// check_rejects_target: checked before the first row is read); DataError
// when nothing is kept or the reject fraction exceeds the limit.
Catalogue read_catalogue(const CatalogueOptions& options);

}  // namespace credence
