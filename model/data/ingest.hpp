// Rating ingest: a CSV/TSV export, a SQLite database or a PostgreSQL query
// in (model/data/row_source.hpp), a validated RatingSet out, and nothing
// lost silently. Every row read is either kept, rejected (written to the
// rejects file with its line number and reason) or merged into another row
// by the duplicate policy; the summary's counts add up to rows read.
//
// Format: RFC 4180 (quoted fields, doubled quotes, delimiters and line breaks
// inside quotes, LF/CRLF/CR line ends), optional UTF-8 BOM. Spaces and tabs
// around a field are not part of it. A stray quote that never closes costs
// only the line it opens on; one that a later quote closes (within 1 MiB)
// makes one malformed record of the lines between (see model/data/csv_reader.hpp).
//
// Databases: `path` "sqlite:FILE" or a "postgresql://" URI, with `query`
// the SELECT whose result columns are chosen by name or index as a file's
// header columns are; a NULL customer, product, rating or timestamp is
// rejected like an empty one ("NULL rating"). Rows stream (a SQLite
// statement stepped row by row, libpq's single-row mode).
//
// Rejects file: TSV with a header line "line<TAB>reason<TAB>record" ("row"
// for a query: the 1-based result row, and the record as column=value
// pairs); line is the 1-based physical line where the record starts (a
// reason names the span "lines A-B" of a record over several lines); a tab,
// CR, LF, NUL or backslash inside reason or record is written as \t, \r, \n,
// \0 or \\ (so one reject is one line and the file holds no NUL byte). A run
// that rejects nothing removes a rejects file left at that path by an
// earlier run. Only a rejects file (one that starts with that header line)
// is ever overwritten or removed: a rejects path naming any other existing
// file (the ratings, a model, a note) is refused before the first row is read,
// and a device or a pipe there is written to, never removed.
//
// Lines: a quoted field may hold line breaks, but a record spanning more than
// 8 lines is taken for a stray quote: its first line is rejected and reading
// resumes on the next. An id (customer or product) holding a line break or a
// double quote is rejected with the lines it covers, whatever the source. A
// file in UTF-16 or UTF-32 (by its byte-order mark or its NUL bytes) is
// refused by name.
//
// Memory: the input streams through one 4 MiB buffer; each kept row costs
// 12 bytes while reading (+8 for its timestamp under the latest policy) and
// 4 more while sorting, plus the id maps. Error messages refer to the
// command-line options --customer-column, --product-column, --rating-column,
// --timestamp-column, --delimiter, --header/--no-header, --scale,
// --max-reject-fraction and --rejects-path.
#pragma once
#include <cstdint>
#include <functional>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

#include "model/data/ratings.hpp"

namespace credence {

enum class DuplicatePolicy {
    latest,  // the row with the largest timestamp wins (file order breaks ties and stands in without a timestamp column)
    mean,    // the ratings are averaged
};

struct IngestOptions {
    std::string path{};                   // file to read; "-" is standard input; "sqlite:FILE"; "postgresql://..."
    std::string query{};                  // the SELECT for a database (required there, refused for a file)
    std::optional<char> delimiter{};      // nullopt: detect from the first line (',', '\t', ';' or '|')
    std::optional<bool> has_header{};     // nullopt: detect (first row has a non-numeric rating field;
                                        // naming any column implies a header)
    // Columns by header name (exact, else ignoring case and punctuation) or by
    // 0-based index given as digits ("0", "2"). Defaults: with a header, the
    // header name that matches user/customer/buyer/..., item/product/sku/...,
    // rating/score/stars/... (a header with no match is a DataError naming the
    // option to pass, never a guess); without a header, indices 0, 1, 2.
    std::string user_column{};     // --customer-column
    std::string item_column{};     // --product-column
    std::string rating_column{};   // --rating-column
    // Empty: none, unless the header has "timestamp"/"time"/"date"/... .
    // Values: epoch seconds (any finite number) or ISO-8601 YYYY-MM-DD with an
    // optional [T ]hh:mm[:ss[.fff]] and Z/+hh:mm offset (a date alone is
    // midnight UTC); anything else is rejected.
    std::string timestamp_column{};
    std::optional<RatingScale> scale{};   // declared scale: ratings outside are rejected
    DuplicatePolicy duplicates = DuplicatePolicy::latest;
    // In [0, 1]. Above this the ingest throws DataError. Below 0.5, a file whose first
    // 1000+ rows are mostly rejected stops early (a wrong delimiter or column).
    double max_reject_fraction = 0.01;
    // Empty: "<path>.rejects.tsv" when any row is rejected ("-" input: none;
    // sqlite:FILE: "FILE.rejects.tsv"; PostgreSQL: "<database>.rejects.tsv"
    // in the working directory).
    std::string rejects_path{};
    // Called after each buffer fill (every 4 MiB) with bytes consumed so far
    // and total (0 if unknown); for a database every 65,536 rows with rows
    // read and 0.
    std::function<void(uint64_t bytes_done, uint64_t bytes_total)> progress{};
};

struct IngestSummary {
    uint64_t rows_read = 0;        // data rows (records; header excluded, blank lines excluded)
    uint64_t kept = 0;             // ratings in the result
    uint64_t rejected = 0;         // rows written to the rejects file
    uint64_t merged_duplicates = 0;// rows folded into another by the duplicate policy
    uint64_t blank_lines = 0;      // skipped, not counted as rows
    // Physical lines: a row whose quoted field holds line breaks covers several.
    uint64_t lines_read = 0;       // every line of the file (header, blank lines and rows)
    uint64_t header_lines = 0;     // lines of the header row (0 without one)
    uint64_t row_lines = 0;        // lines covered by rows
    uint64_t rejected_lines = 0;   // lines covered by rejected rows (part of row_lines)
    std::string rejects_path;      // where rejects went ("" if none)
    // A rejects file from an earlier run at the rejects path when this run
    // rejected nothing: "removed" or "left (<reason>)"; empty when there was none.
    std::string stale_rejects;
    char delimiter = ',';          // 0 for a database
    bool had_header = false;
    std::string fingerprint;       // xxh3-64 hex of the file bytes (of a query's column names and rows), for the posterior's metadata
    // rows_read == kept + rejected + merged_duplicates and
    // lines_read == header_lines + blank_lines + row_lines always hold (for
    // a query a row is one line and there is no header line).
};

struct IngestResult {
    RatingSet ratings;
    IngestSummary summary;
};

// Reads the file in a streaming pass. Throws
//   OptionError  for options that cannot work: no path, a quote or line break
//                as delimiter, max_reject_fraction outside [0, 1], a declared
//                scale that is empty or not finite, a database without a
//                query or a file with one, a PostgreSQL URI that holds a
//                password (it belongs in PGPASSWORD or a password file);
//   FileError    when the file is a directory or cannot be opened or read,
//                the database cannot be opened or reached, the rejects path
//                names an existing file that is not a rejects file (see
//                check_rejects_target; checked before the first row is
//                read), or the rejects file cannot be written;
//   DataError    when the columns cannot be found in the file (a named column
//                is absent, an index is out of range, no default matches),
//                nothing is kept, more than 2^32 - 1 ratings or ids, or the
//                reject fraction exceeds max_reject_fraction (the message
//                gives counts, the first reject and the rejects path), or
//                the database refuses the query.
// Every message names the file and the option to change. Ratings in the result are sorted by (user, item) and
// unique; ids are interned in order of first appearance among kept rows.
// The scale is the declared one (declared = true) or the observed min/max.
IngestResult ingest_ratings(const IngestOptions& options);

// Human summary, one line: "read 1000 rows: kept 990, rejected 4, merged 6
// duplicates (rejects in x.rejects.tsv)", then "; 1003 lines: 1 header, 2
// blank, 1000 in rows (5 in rejected rows)" when rows span several lines or
// lines were skipped, and what became of a stale rejects file.
std::string describe(const IngestSummary& summary);

// A field as ingest reads it (an id, a rating, a timestamp, a header name):
// without the spaces and tabs around it; nothing else is removed. Returns a
// view into `field`.
std::string_view trim_field(std::string_view field);

// Whether `path` names a file that begins with a rejects file's header line
// ("line<TAB>reason<TAB>record" or "row<TAB>reason<TAB>record", then LF), the
// only kind of file Credence overwrites or removes at a rejects path. False
// when the path is absent, unreadable, or holds anything else (an empty
// file too).
bool is_rejects_file(const std::string& path);

// Refuses a rejects path where writing rejects would destroy another file:
// throws FileError, naming `path` and ending with `remedy` (what to do
// instead, e.g. "pass another --rejects-path"), when `path` names an existing
// regular file (through any symbolic link) that is_rejects_file does not
// recognise. A missing path, a rejects file, a device or a pipe pass; so does
// a folder (writing there fails with its own FileError). Ingest and the
// catalogue reader call it before the first row and again before they write
// rejects.
void check_rejects_target(const std::string& path, const std::string& remedy);

// Where a file's customer ids are, as ingest_ratings finds them.
struct CustomerColumn {
    bool has_header = false;  // the first non-blank record is a header, not a row
    size_t index = 0;         // 0-based column of the customer (user) id
};

// The customer column of a file whose first non-blank record has the fields
// `first` (each trimmed with trim_field), for tools that need no other
// column (credence forget). Whenever ingest_ratings would accept the same
// options and record, the answer is the one it uses: the header detected or
// taken from options.has_header by the same rule, the column chosen by the
// same rules with the other roles' choices taken first where ingest takes
// them first. A problem with another role's column (none recognised, an
// index out of range) is no error here. Reads only has_header and the four
// column specs of `options`. `where` names the record in messages
// ("export.csv, line 1"). Throws DataError as ingest_ratings does when the
// customer column itself cannot be chosen (a named column absent, a name
// without a header, an index out of range, no default match, a column
// already chosen for another role); messages quote a header's names, never
// the fields of a data row (they may hold a customer id).
CustomerColumn choose_customer_column(const IngestOptions& options, const std::vector<std::string>& first,
                                      const std::string& where);

}  // namespace credence
