// The rating-file flags shared by every subcommand that reads ratings
// (fit, evaluate): delimiter, header, columns, scale, duplicates, rejects.
#pragma once
#include <CLI/CLI.hpp>
#include <string>

#include "model/data/ingest.hpp"

namespace credence::cli {

struct IngestFlags {
    std::string path;
    std::string delimiter;   // "", ",", "tab", ";", "|"
    bool no_header = false;
    bool header = false;
    std::string user_column, item_column, rating_column, timestamp_column;
    std::string scale;       // "MIN:MAX"
    std::string duplicates = "latest";
    double max_reject_fraction = 0.01;
    std::string rejects_path;
};

// Adds the flags to `cmd`; `ratings_flag` is the long name of the file flag.
void add_ingest_flags(CLI::App& cmd, IngestFlags& flags, const std::string& ratings_flag = "--ratings");

// Turns parsed flags into options; throws std::invalid_argument on a bad
// --scale or --delimiter with a message saying what is accepted.
IngestOptions to_ingest_options(const IngestFlags& flags);

}  // namespace credence::cli
