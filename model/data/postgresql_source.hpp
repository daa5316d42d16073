// A PostgreSQL query as a row source for ingest (model/data/row_source.hpp):
// `--ratings postgresql://USER@HOST:PORT/DB --query 'SELECT ...'`, through
// libpq. The password never comes from the command line: a URI that holds
// one is refused, and libpq takes it from PGPASSWORD or a password file
// (PGPASSFILE, ~/.pgpass, or passfile= in the URI). The session is
// read-only (default_transaction_read_only), the query is one statement
// (the extended protocol refuses more), and rows stream in libpq's
// single-row mode, so memory does not grow with the result. Values arrive
// as PostgreSQL writes them as text (floats in their shortest exact form);
// NULL stays NULL.
#pragma once
#include <cstdint>
#include <functional>
#include <memory>
#include <string>

#include "model/data/row_source.hpp"

namespace credence {

// Whether `path` is a PostgreSQL connection URI (postgresql:// or postgres://).
bool is_postgresql_source(const std::string& path);

// "<database>.rejects.tsv" in the working directory ("postgresql.rejects.tsv"
// when the URI names no database).
std::string postgresql_rejects_path(const std::string& uri);

// Connects (10 s connect timeout unless the URI sets connect_timeout) and
// sends `query`. Throws OptionError for a URI libpq cannot parse or one
// that holds a password; FileError when the server cannot be reached or
// refuses the login (libpq's message, and where a password comes from);
// DataError when the server refuses the query (its message, naming --query).
// `progress` may be empty.
std::unique_ptr<RowSource> open_postgresql_source(const std::string& uri, const std::string& query,
                                                  std::function<void(uint64_t, uint64_t)> progress);

}  // namespace credence
