// The catalogue reader: one streaming pass of csv_reader, rejects written as
// model/data/ingest.hpp describes, counts that add up.
#include "model/data/catalogue.hpp"

#include <cctype>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <memory>
#include <optional>
#include <vector>

#include <fmt/format.h>

#include "model/data/csv_reader.hpp"
#include "model/error.hpp"

namespace credence {
namespace {

constexpr const char* kRejectsRemedy = "move that file away, then fit again";

std::string trimmed(std::string_view s) {
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return std::string(s);
}

std::string lowered(std::string_view s) {
    std::string out;
    for (char c : s) out += static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
    return out;
}

// One reject per line: tab, CR, LF, NUL and backslash escaped (as ingest does).
std::string escaped(std::string_view s) {
    std::string out;
    for (char c : s) {
        switch (c) {
            case '\t': out += "\\t"; break;
            case '\r': out += "\\r"; break;
            case '\n': out += "\\n"; break;
            case '\0': out += "\\0"; break;
            case '\\': out += "\\\\"; break;
            default: out += c;
        }
    }
    return out;
}

struct Columns {
    size_t id = 0, name = 1;
    std::optional<size_t> category = 2;
};

Columns header_columns(const std::vector<std::string>& header) {
    Columns c;
    std::optional<size_t> id, name, category;
    for (size_t k = 0; k < header.size(); ++k) {
        const std::string h = lowered(header[k]);
        if (!name && (h == "name" || h == "product_name" || h == "title")) name = k;
        else if (!category && (h == "category" || h == "department" || h == "section")) category = k;
        else if (!id) id = k;
    }
    c.id = id.value_or(0);
    c.name = *name;
    c.category = category;
    return c;
}

}  // namespace

Catalogue read_catalogue(const CatalogueOptions& o) {
    if (!(o.max_reject_fraction >= 0.0 && o.max_reject_fraction <= 1.0))
        throw OptionError("--max-reject-fraction must be in [0, 1]");
    std::unique_ptr<std::FILE, int (*)(std::FILE*)> file(std::fopen(o.path.c_str(), "rb"), &std::fclose);
    if (!file || std::filesystem::is_directory(o.path))
        throw FileError("cannot open catalogue " + o.path + "; check the --catalogue path");
    CsvReader reader(file.get());
    const std::string_view start = reader.peek();
    const size_t first_line = start.find_first_of("\r\n");
    const std::string_view head = start.substr(0, first_line);
    reader.set_delimiter(head.find('\t') != std::string_view::npos ? '\t' : ',');

    Catalogue out;
    IngestSummary& s = out.summary;
    s.delimiter = reader.delimiter();
    const std::string rejects_path = o.rejects_path.empty() ? o.path + ".rejects.tsv" : o.rejects_path;
    // Before any row is read: rejects never go over a file that is not a rejects file.
    check_rejects_target(rejects_path, kRejectsRemedy);
    std::ofstream rejects;
    std::string first_reject;
    const auto reject = [&](const CsvRecord& r, const std::string& reason) {
        ++s.rejected;
        s.rejected_lines += r.end_line - r.line + 1;
        if (first_reject.empty()) first_reject = fmt::format("line {}: {}", r.line, reason);
        if (!rejects.is_open()) {
            check_rejects_target(rejects_path, kRejectsRemedy);
            rejects.open(rejects_path, std::ios::trunc);
            if (!rejects) throw FileError("cannot write the catalogue rejects file " + rejects_path);
            rejects << "line\treason\trecord\n";
            s.rejects_path = rejects_path;
        }
        rejects << r.line << '\t' << escaped(reason) << '\t' << escaped(r.raw) << '\n';
    };

    Columns columns;
    bool first = true;
    CsvRecord r;
    while (reader.next(r)) {
        s.lines_read = r.end_line;
        // A blank line is skipped and counted, as ingest does for ratings.
        if (r.problem == CsvProblem::none && trimmed(r.raw).empty()) continue;
        if (first && r.problem == CsvProblem::none) {
            first = false;
            std::vector<std::string> fields;
            for (auto f : r.fields) fields.push_back(trimmed(f));
            bool has_name = false;
            for (const auto& f : fields) has_name |= lowered(f) == "name" || lowered(f) == "product_name" || lowered(f) == "title";
            if (has_name) {
                columns = header_columns(fields);
                s.had_header = true;
                s.header_lines = r.end_line - r.line + 1;
                continue;
            }
        }
        first = false;
        ++s.rows_read;
        s.row_lines += r.end_line - r.line + 1;
        if (r.problem != CsvProblem::none) { reject(r, describe(r.problem)); continue; }
        const size_t need = std::max(columns.id, columns.name) + 1;
        if (r.fields.size() < need) { reject(r, fmt::format("{} fields, need at least {}", r.fields.size(), need)); continue; }
        const std::string id = trimmed(r.fields[columns.id]);
        const std::string name = trimmed(r.fields[columns.name]);
        const std::string category =
            columns.category && *columns.category < r.fields.size() ? trimmed(r.fields[*columns.category]) : "";
        if (id.empty()) { reject(r, "empty product id"); continue; }
        if (name.empty()) { reject(r, "empty name for product '" + id + "'"); continue; }
        auto [it, inserted] = out.products.try_emplace(id, CatalogueEntry{name, category});
        if (inserted) { ++s.kept; continue; }
        if (it->second.name == name && it->second.category == category) { ++s.merged_duplicates; continue; }
        reject(r, "product '" + id + "' listed again with another name or category (the first row stands)");
    }
    s.blank_lines = s.lines_read - s.header_lines - s.row_lines;
    if (s.kept == 0)
        throw DataError("catalogue " + o.path + ": no product kept" +
                        (first_reject.empty() ? std::string() : " (first reject " + first_reject + ")"));
    if (static_cast<double>(s.rejected) > o.max_reject_fraction * static_cast<double>(s.rows_read))
        throw DataError(fmt::format("catalogue {}: rejected {} of {} rows (first {}), more than --max-reject-fraction "
                                    "{}; see {}",
                                    o.path, s.rejected, s.rows_read, first_reject, o.max_reject_fraction, rejects_path));
    return out;
}

}  // namespace credence
