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
// The file is rewritten through a temporary file in the real file's own
// directory (symbolic links are followed, so a link keeps pointing at the
// cleaned export) and renamed over it, so a failure leaves it as it was. The
// temporary file is created readable by its owner only and given the
// original's owner, group and permission bits before any row is written: the
// export never becomes readable by more people than before. A file with
// several names (hard links) is refused, since the other names would keep
// the rows. CSV exports only: a database source (sqlite:PATH,
// postgresql://) is read-only to Credence, so forget refuses it and says to
// delete the rows in the database. Erasure is complete only after a refit
// (README, "Security and privacy").
#include <fcntl.h>
#include <sys/stat.h>
#include <unistd.h>

#include <cerrno>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <iostream>
#include <memory>
#include <optional>
#include <string>
#include <vector>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "model/data/csv_reader.hpp"
#include "model/data/ingest.hpp"
#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence::cli {
namespace {

struct ForgetFlags {
    std::string customer;
    // The file and how to read it, as for fit: path, delimiter, header and
    // column flags (header names or 0-based indices; "" = found as ingest
    // finds them). The other ingest flags stay at their defaults.
    IngestFlags file;
};

using File = std::unique_ptr<std::FILE, int (*)(std::FILE*)>;

char delimiter_of(const ForgetFlags& f, const IngestOptions& options, CsvReader& reader) {
    if (options.delimiter) return *options.delimiter;
    const auto found = detect_delimiter(reader.peek());
    if (!found) throw DataError(f.file.path + ": no field delimiter found; give --delimiter");
    return *found;
}

// The options ingest would read the file with (only the delimiter, the
// header and the column choices matter here). Throws OptionError for a bad
// --delimiter.
IngestOptions column_options(const ForgetFlags& f) { return to_ingest_options(f.file); }

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
    const IngestOptions options = column_options(f);
    CsvReader reader(in);
    reader.set_delimiter(delimiter_of(f, options, reader));
    reader.peek();  // reads past any byte-order mark, so had_bom() knows
    if (reader.had_bom()) std::fputs("\xEF\xBB\xBF", out);
    Outcome o;
    CsvRecord record;
    std::optional<CustomerColumn> column;  // known from the first non-blank record on
    while (reader.next(record)) {
        bool is_header = false;
        if (!column && !blank(record)) {
            const std::string where = f.file.path + ", line " + std::to_string(record.line);
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
    if (is_sqlite_source(f.file.path) || is_postgresql_source(f.file.path))
        throw OptionError("--ratings names a database; Credence only reads databases (read-only, through --query), "
                          "so delete the customer's rows there (DELETE ... WHERE <customer column> = the id), then "
                          "refit and reload; POST /v1/admin/forget drops the customer from the served model at once");
    if (!f.file.no_header) return;
    for (const auto& [flag, value] : {std::pair{"--customer-column", &f.file.customer_column},
                                      std::pair{"--product-column", &f.file.product_column},
                                      std::pair{"--rating-column", &f.file.rating_column},
                                      std::pair{"--timestamp-column", &f.file.timestamp_column}}) {
        const bool name = !value->empty() && value->find_first_not_of("0123456789") != std::string::npos;
        if (name)
            throw OptionError(std::string(flag) + " '" + *value +
                              "' is a name, but --no-header says there is no header; give a 0-based index");
    }
}

// Gives the open temporary file `fd` the owner, group and permission bits of
// the export (`original`), so the rewritten export is readable by exactly
// whom the original was. Throws FileError when that cannot be done.
void copy_access(int fd, const struct stat& original, const std::string& path) {
    struct stat now {};
    if (::fstat(fd, &now) != 0) throw FileError(path + ": cannot check the rewritten copy: " + std::strerror(errno));
    if ((now.st_uid != original.st_uid || now.st_gid != original.st_gid) &&
        ::fchown(fd, original.st_uid, original.st_gid) != 0)
        throw FileError(path + ": cannot give the rewritten export the file's owner and group (" +
                        std::strerror(errno) +
                        "); nothing was changed. Run forget as the file's owner (or as root), so the export "
                        "keeps who may read it");
    if (::fchmod(fd, original.st_mode & 07777) != 0)
        throw FileError(path + ": cannot give the rewritten export the file's permissions (" + std::strerror(errno) +
                        "); nothing was changed");
}

int run_forget(const ForgetFlags& f) {
    check_flags(f);
    namespace fs = std::filesystem;
    // The export itself, through any symbolic links: it is rewritten in its
    // own directory, and the links keep pointing at it.
    std::error_code ec;
    const fs::path target = fs::canonical(f.file.path, ec);
    if (ec) throw FileError(f.file.path + ": cannot open for reading (" + ec.message() + "); check the path");
    struct stat original {};
    if (::stat(target.c_str(), &original) != 0)
        throw FileError(f.file.path + ": cannot open for reading (" + std::strerror(errno) + "); check the path");
    if (!S_ISREG(original.st_mode))
        throw FileError(f.file.path + " is not a regular file; forget rewrites a ratings export file, pass its path");
    if (original.st_nlink > 1)
        throw FileError(f.file.path + " has " + std::to_string(original.st_nlink) +
                        " names (hard links), and rewriting it would leave the customer's rows under the other "
                        "names; nothing was changed. Remove the other names (find them with find -samefile), "
                        "then run forget again");
    File in(std::fopen(target.c_str(), "rb"), &std::fclose);
    if (!in) throw FileError(f.file.path + ": cannot open for reading (" + std::strerror(errno) + ")");
    const fs::path temp =
        target.parent_path() / ("." + target.filename().string() + ".forget-" + std::to_string(::getpid()));
    const int fd = ::open(temp.c_str(), O_WRONLY | O_CREAT | O_EXCL | O_CLOEXEC, 0600);
    if (fd < 0 && errno == EEXIST)
        throw FileError(temp.string() + " exists: an interrupted forget left it; delete it (it holds ratings) and "
                        "run forget again");
    if (fd < 0)
        throw FileError(temp.string() + ": cannot create the rewritten export next to " + target.string() + " (" +
                        std::strerror(errno) + "); the folder must be writable");
    File out(::fdopen(fd, "wb"), &std::fclose);
    if (!out) {
        ::close(fd);
        fs::remove(temp, ec);
        throw FileError(temp.string() + ": cannot write the rewritten export");
    }
    Outcome o;
    try {
        copy_access(fd, original, f.file.path);
        o = copy_without(f, in.get(), out.get());
        if (std::fflush(out.get()) != 0 || ::fsync(fd) != 0)
            throw FileError(temp.string() + ": write failed (disk full?); " + f.file.path + " is unchanged");
    } catch (...) {
        out.reset();
        fs::remove(temp, ec);
        throw;
    }
    if (std::fclose(out.release()) != 0) {
        fs::remove(temp, ec);
        throw FileError(temp.string() + ": write failed (disk full?); " + f.file.path + " is unchanged");
    }
    if (o.rows_removed == 0) {
        fs::remove(temp, ec);
        std::cout << f.file.path << ": the customer has no rows here; nothing removed (" << o.rows_kept
                  << " rows checked)\n";
        return 0;
    }
    if (::rename(temp.c_str(), target.c_str()) != 0) {
        const std::string why = std::strerror(errno);
        fs::remove(temp, ec);
        throw FileError(target.string() + ": cannot replace it with the rewritten export (" + why + "); " + f.file.path +
                        " is unchanged");
    }
    // Makes the rename itself durable; the data is already synced, so a
    // failure here only risks the old file reappearing after a crash.
    if (const int dir = ::open(target.parent_path().c_str(), O_RDONLY | O_DIRECTORY | O_CLOEXEC); dir >= 0) {
        ::fsync(dir);
        ::close(dir);
    }
    // The customer id is not printed: this output may end up in logs.
    std::cout << f.file.path << ": removed " << o.rows_removed << " rows (" << o.lines_removed
              << " lines) of the customer; " << o.rows_kept << " rows kept";
    if (fs::is_symlink(f.file.path, ec)) std::cout << " (rewritten at " << target.string() << ", where the link points)";
    std::cout << ". Lines end in LF now. Refit and reload the model to finish the erasure.\n";
    return 0;
}

}  // namespace

Runner add_forget_command(CLI::App& app) {
    auto flags = std::make_shared<ForgetFlags>();
    auto* cmd = app.add_subcommand("forget", "Remove one customer's rows from a ratings export (erasure on request)");
    cmd->add_option("--ratings", flags->file.path, "Ratings export (CSV or TSV), rewritten in place")->required();
    cmd->add_option("--customer", flags->customer, "The customer id whose rows go")->required();
    cmd->add_option("--customer-column", flags->file.customer_column,
                    "Customer id column, by header name or 0-based index (default: found as fit finds it)");
    cmd->add_option("--product-column", flags->file.product_column, "As given to fit, if it was (helps find the customer column)");
    cmd->add_option("--rating-column", flags->file.rating_column, "As given to fit, if it was (helps detect the header)");
    cmd->add_option("--timestamp-column", flags->file.timestamp_column, "As given to fit, if it was");
    cmd->add_option("--delimiter", flags->file.delimiter, "Field delimiter: ',', ';', '|' or 'tab' (default: detected)");
    auto* nh = cmd->add_flag("--no-header", flags->file.no_header, "The first row is data, not column names");
    cmd->add_flag("--header", flags->file.header, "The first row is column names (default: detected as fit detects it)")
        ->excludes(nh);
    return [flags] { return run_forget(*flags); };
}

}  // namespace credence::cli
