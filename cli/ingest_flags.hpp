// The rating-source flags shared by every subcommand that reads ratings
// (fit, evaluate, compare): the file or database and its query, delimiter,
// header, columns, scale, duplicates, rejects. Column flags use the shop's words (--customer-column,
// --product-column); the earlier --user-column and --item-column are refused
// with a usage error that names the new flag.
#pragma once
#include <CLI/CLI.hpp>
#include <string>

#include "model/data/ingest.hpp"

namespace credence::cli {

struct IngestFlags {
    std::string path;
    std::string query;       // --query: the SELECT for a database source
    std::string delimiter;   // "", ",", "tab", ";", "|"
    bool no_header = false;
    bool header = false;
    std::string customer_column, product_column, rating_column, timestamp_column;
    std::string scale;       // "MIN:MAX"
    std::string duplicates = "latest";
    double max_reject_fraction = 0.01;
    std::string rejects_path;
};

// Adds the flags to `cmd`; `ratings_flag` is the long name of the file flag.
// Parsing a renamed flag throws CLI::ParseError with exit code 2 and the
// message "--user-column is now --customer-column" (or the --item-column one).
void add_ingest_flags(CLI::App& cmd, IngestFlags& flags, const std::string& ratings_flag = "--ratings");

// Turns parsed flags into options; throws OptionError on a bad
// --scale or --delimiter with a message saying what is accepted, and when
// --rejects-path names the --ratings file itself (the same existing file,
// by std::filesystem::equivalent), so rejects can never be written over it.
IngestOptions to_ingest_options(const IngestFlags& flags);

}  // namespace credence::cli
