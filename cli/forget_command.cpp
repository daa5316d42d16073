// `credence forget`: erasure on request. Removes every row of one customer
// from a CSV/TSV ratings export (RFC 4180 records, read with CsvReader) and
// reports how many rows and physical lines went.
//
// Rows are matched as ingest reads them, so that no row a refit would see
// survives: the header is detected and the customer column chosen by
// ingest's own rules (choose_customer_column; the same --customer-column,
// --product-column, --rating-column, --timestamp-column and
// --header/--no-header as fit), and a customer field is compared after
// ingest's trimming of the spaces and tabs around it (trim_field).
//
// The file is rewritten through a temporary file in the same directory and
// renamed over the original, so a failure leaves it as it was. CSV exports
// only: a database source (sqlite:PATH, postgresql://) is read-only to
// Credence, so forget refuses it and says to delete the rows in the
// database. Erasure is complete only after a refit (README, "Security and
// privacy").
#include <unistd.h>

#include <cstdio>
#include <filesystem>
#include <iostream>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "cli/commands.hpp"
#include "model/data/csv_reader.hpp"
#include "model/data/ingest.hpp"
#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence::cli {
namespace {

struct ForgetFlags {
    std::string path;
    std::string customer;
    // As for fit: header names or 0-based indices; "" = found as ingest finds them.
    std::string customer_column, product_column, rating_column, timestamp_column;
    std::string delimiter;                // "" = detected
    bool no_header = false;
    bool header = false;
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

// The options ingest would read the columns with (only the header and the
// column choices matter here).
IngestOptions column_options(const ForgetFlags& f) {
    IngestOptions o;
    if (f.no_header) o.has_header = false;
    if (f.header) o.has_header = true;
    o.user_column = f.customer_column;
    o.item_column = f.product_column;
    o.rating_column = f.rating_column;
    o.timestamp_column = f.timestamp_column;
    return o;
}

bool blank(const CsvRecord& record) {
    return record.problem == CsvProblem::none && record.raw.find_first_not_of(" \t") == std::string_view::npos;
}

struct Outcome {
    uint64_t rows_removed = 0, lines_removed = 0, rows_kept = 0;
};

// Copies `in` to `out` less the records whose customer field, trimmed as
// ingest trims it, is `customer`. The header and blank lines are kept;
// malformed records are kept as they are (the ingest reports them).
Outcome copy_without(const ForgetFlags& f, std::FILE* in, std::FILE* out) {
    CsvReader reader(in);
    reader.set_delimiter(delimiter_of(f, reader));
    reader.peek();  // reads past any byte-order mark, so had_bom() knows
    if (reader.had_bom()) std::fputs("\xEF\xBB\xBF", out);
    const IngestOptions options = column_options(f);
    Outcome o;
    CsvRecord record;
    std::optional<CustomerColumn> column;  // known from the first non-blank record on
    while (reader.next(record)) {
        bool is_header = false;
        if (!column && !blank(record)) {
            const std::string where = f.path + ", line " + std::to_string(record.line);
            if (record.problem != CsvProblem::none)
                throw DataError(where + ": " + describe(record.problem) +
                                "; the first row must be readable to find the columns; fix that line");
            std::vector<std::string> first;
            for (const auto field : record.fields) first.emplace_back(trim_field(field));
            column = choose_customer_column(options, first, where);
            is_header = column->has_header;
        }
        const bool drop = column && !is_header && record.problem == CsvProblem::none &&
                          column->index < record.fields.size() &&
                          trim_field(record.fields[column->index]) == f.customer;
        if (drop) {
            ++o.rows_removed;
            o.lines_removed += record.end_line - record.line + 1;
            continue;
        }
        if (!is_header && !blank(record)) ++o.rows_kept;
        std::fwrite(record.raw.data(), 1, record.raw.size(), out);
        std::fputc('\n', out);
    }
    return o;
}

// Flags that cannot work together, before the file is touched.
void check_flags(const ForgetFlags& f) {
    if (f.customer.empty()) throw OptionError("--customer must not be empty");
    if (trim_field(f.customer).size() != f.customer.size())
        throw OptionError("--customer has spaces or tabs around the id; ingest drops those from every id, so no "
                          "customer has such an id: pass the id without them");
    if (is_sqlite_source(f.path) || is_postgresql_source(f.path))
        throw OptionError("--ratings names a database; Credence only reads databases (read-only, through --query), "
                          "so delete the customer's rows there (DELETE ... WHERE <customer column> = the id), then "
                          "refit and reload; POST /v1/admin/forget drops the customer from the served model at once");
    if (!f.no_header) return;
    for (const auto& [flag, value] : {std::pair{"--customer-column", &f.customer_column},
                                      std::pair{"--product-column", &f.product_column},
                                      std::pair{"--rating-column", &f.rating_column},
                                      std::pair{"--timestamp-column", &f.timestamp_column}}) {
        const bool name = !value->empty() && value->find_first_not_of("0123456789") != std::string::npos;
        if (name)
            throw OptionError(std::string(flag) + " '" + *value +
                              "' is a name, but --no-header says there is no header; give a 0-based index");
    }
}

int run_forget(const ForgetFlags& f) {
    check_flags(f);
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
    cmd->add_option("--customer-column", flags->customer_column,
                    "Customer id column, by header name or 0-based index (default: found as fit finds it)");
    cmd->add_option("--product-column", flags->product_column, "As given to fit, if it was (helps find the customer column)");
    cmd->add_option("--rating-column", flags->rating_column, "As given to fit, if it was (helps detect the header)");
    cmd->add_option("--timestamp-column", flags->timestamp_column, "As given to fit, if it was");
    cmd->add_option("--delimiter", flags->delimiter, "Field delimiter: ',', ';', '|' or 'tab' (default: detected)");
    auto* nh = cmd->add_flag("--no-header", flags->no_header, "The first row is data, not column names");
    cmd->add_flag("--header", flags->header, "The first row is column names (default: detected as fit detects it)")
        ->excludes(nh);
    return [flags] { return run_forget(*flags); };
}

}  // namespace credence::cli
