#include "cli/ingest_flags.hpp"

#include <charconv>
#include <filesystem>
#include <stdexcept>
#include <system_error>

#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence::cli {

namespace {

// A renamed flag stays known (hidden from --help) so that using it says what
// it is called now, as a usage error (exit code 2), whether or not a value follows.
void refuse_renamed(CLI::App& cmd, const std::string& old_name, const std::string& new_name) {
    cmd.add_option_function<std::string>(old_name, [old_name, new_name](const std::string&) {
           throw CLI::ParseError(old_name + " is now " + new_name, 2);
       })
        ->expected(0, 1)
        ->group("");
}

}  // namespace

void add_ingest_flags(CLI::App& cmd, IngestFlags& f, const std::string& ratings_flag) {
    cmd.add_option(ratings_flag, f.path,
                   "Ratings: a CSV or TSV export ('-' for standard input), sqlite:PATH, or a postgresql:// URI "
                   "(the password from PGPASSWORD or a password file, never the URI)")
        ->required();
    cmd.add_option("--query", f.query,
                   "For a database: the SELECT returning the ratings (columns chosen as for a file)");
    cmd.add_option("--delimiter", f.delimiter, "Field delimiter: ',', ';', '|' or 'tab' (default: detected)");
    auto* nh = cmd.add_flag("--no-header", f.no_header, "The first row is data, not column names");
    cmd.add_flag("--header", f.header, "The first row is column names (default: detected)")->excludes(nh);
    cmd.add_option("--customer-column", f.customer_column, "Customer id column, by header name or 0-based index");
    cmd.add_option("--product-column", f.product_column, "Product id column, by header name or 0-based index");
    cmd.add_option("--rating-column", f.rating_column, "Rating column, by header name or 0-based index");
    cmd.add_option("--timestamp-column", f.timestamp_column, "Optional timestamp column (orders duplicates)");
    cmd.add_option("--scale", f.scale, "Declared rating scale MIN:MAX; ratings outside it are rejected (default: observed range)");
    cmd.add_option("--duplicates", f.duplicates, "Repeated (user, item) pairs: 'latest' (by timestamp, else file order) or 'mean'")
        ->check(CLI::IsMember({"latest", "mean"}))
        ->capture_default_str();
    cmd.add_option("--max-reject-fraction", f.max_reject_fraction, "Stop if more than this share of rows is rejected")
        ->check(CLI::Range(0.0, 1.0))
        ->capture_default_str();
    cmd.add_option("--rejects-path", f.rejects_path, "Where rejected rows go (default: <ratings>.rejects.tsv)");
    refuse_renamed(cmd, "--user-column", "--customer-column");
    refuse_renamed(cmd, "--item-column", "--product-column");
}

namespace {
// A --rejects-path that names the ratings file itself (by any spelling,
// symbolic or hard link) is a usage error: rejects would be written over
// the ratings. Only an existing file can be the same as the ratings file.
void refuse_rejects_over_ratings(const IngestFlags& f) {
    if (f.rejects_path.empty() || f.path == "-" || is_sqlite_source(f.path) || is_postgresql_source(f.path)) return;
    std::error_code ec;
    if (!std::filesystem::equivalent(f.path, f.rejects_path, ec) || ec) return;
    throw OptionError("--rejects-path " + f.rejects_path + " is the ratings file " + f.path +
                      " itself; rejected rows would be written over the ratings. Pass another --rejects-path, or "
                      "leave it out to use " + f.path + ".rejects.tsv");
}

float parse_float(const std::string& s, const std::string& what) {
    float v = 0;
    const auto [p, ec] = std::from_chars(s.data(), s.data() + s.size(), v);
    if (ec != std::errc() || p != s.data() + s.size())
        throw OptionError("--scale: '" + s + "' is not a number (" + what + ")");
    return v;
}
}  // namespace

IngestOptions to_ingest_options(const IngestFlags& f) {
    IngestOptions o;
    o.path = f.path;
    o.query = f.query;
    if (!f.delimiter.empty()) {
        if (f.delimiter == "tab" || f.delimiter == "\\t" || f.delimiter == "\t") o.delimiter = '\t';
        else if (f.delimiter.size() == 1 && std::string(",;|").find(f.delimiter[0]) != std::string::npos)
            o.delimiter = f.delimiter[0];
        else throw OptionError("--delimiter: use ',', ';', '|' or 'tab', not '" + f.delimiter + "'");
    }
    if (f.no_header) o.has_header = false;
    if (f.header) o.has_header = true;
    o.user_column = f.customer_column;
    o.item_column = f.product_column;
    o.rating_column = f.rating_column;
    o.timestamp_column = f.timestamp_column;
    if (!f.scale.empty()) {
        const auto colon = f.scale.find(':');
        if (colon == std::string::npos) throw OptionError("--scale: expected MIN:MAX, e.g. 1:5, not '" + f.scale + "'");
        RatingScale s;
        s.min = parse_float(f.scale.substr(0, colon), "MIN");
        s.max = parse_float(f.scale.substr(colon + 1), "MAX");
        s.declared = true;
        if (!(s.min < s.max)) throw OptionError("--scale: MIN must be below MAX in '" + f.scale + "'");
        o.scale = s;
    }
    o.duplicates = f.duplicates == "mean" ? DuplicatePolicy::mean : DuplicatePolicy::latest;
    o.max_reject_fraction = f.max_reject_fraction;
    refuse_rejects_over_ratings(f);
    o.rejects_path = f.rejects_path;
    return o;
}

}  // namespace credence::cli
