// A SQLite database as a row source for ingest (model/data/row_source.hpp):
// `--ratings sqlite:PATH --query 'SELECT ...'`. The file is opened read-only
// and the one statement is stepped row by row, so rows stream in constant
// memory. Values are turned into text as the database holds them: integers
// in decimal, reals in the shortest form that reads back as the same double,
// text as stored; NULL stays NULL (ingest rejects it where a value is needed).
#pragma once
#include <cstdint>
#include <functional>
#include <memory>
#include <string>

#include "model/data/row_source.hpp"

namespace credence {

// Whether `path` names a SQLite database ("sqlite:" followed by a file path).
bool is_sqlite_source(const std::string& path);

// "FILE.rejects.tsv" for "sqlite:FILE".
std::string sqlite_rejects_path(const std::string& path);

// Opens the database file named after "sqlite:" read-only and prepares
// `query`. Throws OptionError when no file is named or the query is not
// exactly one statement; FileError when the file does not exist or is not a
// SQLite database; DataError when SQLite refuses the query (the message
// quotes SQLite's and names --query). `progress` may be empty.
std::unique_ptr<RowSource> open_sqlite_source(const std::string& path, const std::string& query,
                                              std::function<void(uint64_t, uint64_t)> progress);

}  // namespace credence
