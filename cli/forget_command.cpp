// `credence forget`: erasure on request. Removes every row of one customer
// from a CSV/TSV ratings export (RFC 4180 records, read with CsvReader) and
// reports how many rows and physical lines went. The file is rewritten
// through a temporary file in the same directory and renamed over the
// original, so a failure leaves it as it was. CSV exports only: a database
// source (sqlite:PATH, postgresql://) is read-only to Credence, so forget
// refuses it and says to delete the rows in the database. Erasure is
// complete only after a refit (README, "Security and privacy").
#include <unistd.h>

#include <charconv>
#include <cstdio>
#include <filesystem>
#include <iostream>
#include <memory>
#include <string>

#include "cli/commands.hpp"
#include "model/data/csv_reader.hpp"
#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence::cli {
namespace {

struct ForgetFlags {
    std::string path;
    std::string customer;
    std::string column = "customer_id";  // header name, or 0-based index
    std::string delimiter;                // "" = detected
    bool no_header = false;
};

using File = std::unique_ptr<std::FILE, int (*)(std::FILE*)>;

char delimiter_of(const ForgetFlags& f, CsvReader& reader) {
    if (f.delimiter == "tab") return '\t';
    if (f.delimiter == "," || f.delimiter == ";" || f.delimiter == "|") return f.delimiter[0];
    if (!f.delimiter.empty()) throw OptionError("--delimiter must be ',', ';', '|' or 'tab', not '" + f.delimiter + "'");
    const auto found = detect_delimiter(reader.peek());
    if (!found) throw DataError(f.path + ": no field delimiter found; give --delimiter");
    return *found;
}

// The customer column's index: a number, or a header name (needs the header).
size_t column_index(const ForgetFlags& f, const CsvRecord& header) {
    size_t index = 0;
    const auto [end, ec] = std::from_chars(f.column.data(), f.column.data() + f.column.size(), index);
    if (ec == std::errc() && end == f.column.data() + f.column.size()) return index;
    if (f.no_header) throw OptionError("--customer-column '" + f.column + "' is a name, but --no-header says there is no header; give a 0-based index");
    for (size_t k = 0; k < header.fields.size(); ++k)
        if (header.fields[k] == f.column) return k;
    throw DataError(f.path + ": no column named '" + f.column + "' in the header; give --customer-column");
}

struct Outcome {
    uint64_t rows_removed = 0, lines_removed = 0, rows_kept = 0;
};

// Copies `in` to `out` less the records whose customer field is `customer`.
// Malformed records are kept as they are (the ingest reports them).
Outcome copy_without(const ForgetFlags& f, std::FILE* in, std::FILE* out) {
    CsvReader reader(in);
    reader.set_delimiter(delimiter_of(f, reader));
    if (reader.had_bom()) std::fputs("\xEF\xBB\xBF", out);
    Outcome o;
    CsvRecord record;
    size_t column = 0;
    bool first = true;
    while (reader.next(record)) {
        const bool is_header = first && !f.no_header;
        if (first) column = column_index(f, record);
        first = false;
        const bool drop = !is_header && record.problem == CsvProblem::none && column < record.fields.size() &&
                          record.fields[column] == f.customer;
        if (drop) {
            ++o.rows_removed;
            o.lines_removed += record.end_line - record.line + 1;
            continue;
        }
        if (!is_header && !record.raw.empty()) ++o.rows_kept;
        std::fwrite(record.raw.data(), 1, record.raw.size(), out);
        std::fputc('\n', out);
    }
    return o;
}

int run_forget(const ForgetFlags& f) {
    if (f.customer.empty()) throw OptionError("--customer must not be empty");
    if (is_sqlite_source(f.path) || is_postgresql_source(f.path))
        throw OptionError("--ratings names a database; Credence only reads databases (read-only, through --query), "
                          "so delete the customer's rows there (DELETE ... WHERE <customer column> = the id), then "
                          "refit and reload; POST /v1/admin/forget drops the customer from the served model at once");
    File in(std::fopen(f.path.c_str(), "rb"), &std::fclose);
    if (!in) throw FileError(f.path + ": cannot open for reading");
    const std::filesystem::path target(f.path);
    const std::filesystem::path temp =
        target.parent_path() / ("." + target.filename().string() + ".forget-" + std::to_string(::getpid()));
    File out(std::fopen(temp.c_str(), "wb"), &std::fclose);
    if (!out) throw FileError(temp.string() + ": cannot create the rewritten export next to " + f.path);
    Outcome o;
    try {
        o = copy_without(f, in.get(), out.get());
        if (std::fflush(out.get()) != 0 || ::fsync(::fileno(out.get())) != 0)
            throw FileError(temp.string() + ": write failed (disk full?)");
    } catch (...) {
        out.reset();
        std::filesystem::remove(temp);
        throw;
    }
    out.reset();
    if (o.rows_removed == 0) {
        std::filesystem::remove(temp);
        std::cout << f.path << ": the customer has no rows here; nothing removed (" << o.rows_kept
                  << " rows checked)\n";
        return 0;
    }
    std::filesystem::rename(temp, target);
    // The customer id is not printed: this output may end up in logs.
    std::cout << f.path << ": removed " << o.rows_removed << " rows (" << o.lines_removed
              << " lines) of the customer; " << o.rows_kept
              << " rows kept. Lines end in LF now. Refit and reload the model to finish the erasure.\n";
    return 0;
}

}  // namespace

Runner add_forget_command(CLI::App& app) {
    auto flags = std::make_shared<ForgetFlags>();
    auto* cmd = app.add_subcommand("forget", "Remove one customer's rows from a ratings export (erasure on request)");
    cmd->add_option("--ratings", flags->path, "Ratings export (CSV or TSV), rewritten in place")->required();
    cmd->add_option("--customer", flags->customer, "The customer id whose rows go")->required();
    cmd->add_option("--customer-column", flags->column, "Customer id column, by header name or 0-based index")
        ->default_val("customer_id");
    cmd->add_option("--delimiter", flags->delimiter, "Field delimiter: ',', ';', '|' or 'tab' (default: detected)");
    cmd->add_flag("--no-header", flags->no_header, "The first line is a row, not a header");
    return [flags] { return run_forget(*flags); };
}

}  // namespace credence::cli
