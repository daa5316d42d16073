// Where ratings come from: a CSV/TSV export (model/data/csv_source.hpp), a
// SQLite database (model/data/sqlite_source.hpp) or a PostgreSQL query
// (model/data/postgresql_source.hpp). Each delivers rows of text fields and
// nothing more; ingest (model/data/ingest.hpp) applies one set of rules to
// all of them (columns chosen by name or index, reject reasons, the rejects
// file, duplicates, the summary's accounting), so a row is kept or rejected
// the same way whatever it came from, and the same rows give the same
// rating set.
#pragma once
#include <cstdint>
#include <functional>
#include <memory>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace credence {

struct SourceRow {
    // Each field as text: a file's field without its quotes; a database
    // value as the database writes it as text (a number in the shortest form
    // that reads back as the same value). Views valid until the next call to
    // RowSource::next().
    std::vector<std::string_view> fields;
    // One entry per field, 1 for a database NULL (its text is empty); empty
    // for a file, which has no NULLs.
    std::vector<uint8_t> is_null;
    // The row as the rejects file quotes it: a file's record as it stands, a
    // database row as "column=value; ..." (NULL written as NULL).
    std::string_view raw;
    uint64_t position = 0;      // 1-based: physical line (file) or result row (query)
    // Where the row ends: the last physical line of a file's record whose
    // quoted field spans lines; == position otherwise (always for a query).
    uint64_t end_position = 0;
    std::string_view problem;   // why a file's record is unreadable (static text); empty when fine
    bool blank = false;         // a blank line of a file: skipped and counted, not a row
};

// What a source says about itself after its last row.
struct SourceFacts {
    std::string fingerprint;          // xxh3-64 hex of the bytes (file) or of the rows and column names (query)
    std::optional<char> delimiter;    // a file's field separator
};

class RowSource {
public:
    virtual ~RowSource() = default;
    // The source as messages name it ("export.csv", "standard input",
    // "sqlite:shop.db", the PostgreSQL URI); never holds a password.
    virtual const std::string& name() const = 0;
    // What SourceRow::position counts: "line" or "row".
    virtual const char* position_unit() const = 0;
    // The column names when the source declares them (a query's result
    // columns); nullopt for a file, whose first record may be a header or
    // data (ingest decides). Call before the first next().
    virtual std::optional<std::vector<std::string>> column_names() = 0;
    // The next row into `row`; false at the end. Throws FileError when the
    // input cannot be read and DataError when the database reports an error
    // while rows stream; both messages name the source.
    virtual bool next(SourceRow& row) = 0;
    virtual SourceFacts facts() const = 0;
};

// Builds the SourceRows of a query's result for the database sources: holds
// one row's values, writes its raw form ("column=value; ..."), counts rows
// (calling `progress` every 65,536 with the count and 0) and hashes the
// column names and every row, NULLs told apart from empty text, into the
// fingerprint (xxh3-64).
class QueryRowBuilder {
public:
    QueryRowBuilder(std::vector<std::string> columns, std::function<void(uint64_t, uint64_t)> progress);
    ~QueryRowBuilder();
    QueryRowBuilder(const QueryRowBuilder&) = delete;
    QueryRowBuilder& operator=(const QueryRowBuilder&) = delete;

    const std::vector<std::string>& columns() const { return columns_; }
    void begin_row();
    void add_null();
    void add_text(std::string_view text);
    // Fills `row` with the values added since begin_row (views into this
    // builder, valid until the next begin_row). Needs one value per column
    // (std::logic_error otherwise: a bug in the source).
    void finish_row(SourceRow& row);
    std::string fingerprint() const;

private:
    struct Hash;
    std::vector<std::string> columns_;
    std::function<void(uint64_t, uint64_t)> progress_;
    std::unique_ptr<Hash> hash_;
    std::string text_, raw_;
    std::vector<std::pair<size_t, size_t>> spans_;  // offset and length in text_
    std::vector<uint8_t> nulls_;
    uint64_t rows_ = 0;
};

}  // namespace credence
