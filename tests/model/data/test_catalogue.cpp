// Tests for model/data/catalogue: every reject reason lands in the rejects
// file with its line, the counts add up as for ratings (rows_read == kept +
// rejected + merged_duplicates; lines_read == header + blank + row lines),
// the columns are found by header name, the reject limit holds, and rejects
// are never written over a file that is not a rejects file.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <string>
#include <vector>

#include "model/data/catalogue.hpp"
#include "model/error.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
using credence::testing::scratch_dir;
namespace fs = std::filesystem;

namespace {

fs::path write_file(const fs::path& dir, const std::string& name, const std::string& text) {
    const auto path = dir / name;
    std::ofstream out(path, std::ios::binary);
    out << text;
    return path;
}

std::vector<std::string> read_lines(const fs::path& path) {
    std::ifstream in(path);
    std::vector<std::string> lines;
    for (std::string line; std::getline(in, line);) lines.push_back(line);
    return lines;
}

}  // namespace

TEST_CASE("bad catalogue rows go to the rejects file with line and reason, and the counts add up") {
    const fs::path dir = scratch_dir("catalogue_rejects");
    // Header in another column order; line 3 has no name, line 4 an empty
    // id, line 6 an exact repeat (merged), line 7 a repeat with another
    // name (rejected, the first stands), line 8 an unterminated quote
    // that runs to the end of the file.
    const fs::path path = write_file(dir, "catalogue.csv",
                                     "Category,SKU,Name\n"
                                     "tea,tea-0001,Slow Roast White\n"
                                     "tea,tea-0002,\n"
                                     "tea,,Nameless Leaf\n"
                                     "\n"
                                     "tea,tea-0001,Slow Roast White\n"
                                     "paper,tea-0001,Another Name\n"
                                     "paper,paper-0001,\"Slate Weekly Planner\n");
    const fs::path rejects = dir / "catalogue.rejects.tsv";
    fs::remove(rejects);
    const Catalogue c = read_catalogue({.path = path.string(), .max_reject_fraction = 1.0, .rejects_path = rejects.string()});
    const IngestSummary& s = c.summary;
    CHECK(s.had_header);
    CHECK(s.kept == 1);
    CHECK(s.merged_duplicates == 1);
    CHECK(s.rejected == 4);
    CHECK(s.rows_read == s.kept + s.rejected + s.merged_duplicates);
    CHECK(s.blank_lines == 1);
    CHECK(s.lines_read == s.header_lines + s.blank_lines + s.row_lines);
    CHECK(s.rejects_path == rejects.string());
    REQUIRE(c.products.count("tea-0001") == 1);
    CHECK(c.products.at("tea-0001").name == "Slow Roast White");
    CHECK(c.products.at("tea-0001").category == "tea");

    const auto lines = read_lines(rejects);
    REQUIRE(lines.size() == 5);  // header + 4 rejects
    CHECK(lines[0] == "line\treason\trecord");
    CHECK(lines[1].rfind("3\tempty name for product 'tea-0002'\t", 0) == 0);
    CHECK(lines[2].rfind("4\tempty product id\t", 0) == 0);
    CHECK(lines[3].rfind("7\tproduct 'tea-0001' listed again with another name or category", 0) == 0);
    CHECK(lines[4].rfind("8\t", 0) == 0);
}

TEST_CASE("a catalogue past the reject limit, or with nothing kept, is a data error naming the rejects file") {
    const fs::path dir = scratch_dir("catalogue_limit");
    const fs::path path = write_file(dir, "catalogue.csv", "kitchen-0001,Walnut Spoon Set\nkitchen-0002\nkitchen-0003\n");
    try {
        read_catalogue({.path = path.string(), .max_reject_fraction = 0.5, .rejects_path = ""});
        FAIL("expected a DataError");
    } catch (const DataError& e) {
        const std::string what = e.what();
        CHECK(what.find("rejected 2 of 3 rows") != std::string::npos);
        CHECK(what.find("catalogue.csv.rejects.tsv") != std::string::npos);
    }
    const fs::path none = write_file(dir, "empty.csv", "name\n,\n");
    CHECK_THROWS_AS(read_catalogue({.path = none.string(), .max_reject_fraction = 1.0, .rejects_path = ""}), DataError);
    CHECK_THROWS_AS(read_catalogue({.path = (dir / "missing.csv").string(), .max_reject_fraction = 1.0, .rejects_path = ""}),
                    FileError);
    CHECK_THROWS_AS(read_catalogue({.path = path.string(), .max_reject_fraction = 1.5, .rejects_path = ""}), OptionError);
}

TEST_CASE("catalogue rejects are never written over a file that is not a rejects file") {
    const fs::path dir = scratch_dir("catalogue_rejects_foreign");
    const fs::path path = write_file(dir, "catalogue.csv", "sku,name\nkitchen-0001,Walnut Spoon Set\nkitchen-0002,\n");
    const fs::path notes = write_file(dir, "catalogue.csv.rejects.tsv", "my notes\n");
    for (const fs::path& target : {notes, path}) {
        INFO(target);
        const std::string before = read_lines(target).front();
        try {
            read_catalogue({.path = path.string(), .max_reject_fraction = 1.0, .rejects_path = target == notes ? "" : target.string()});
            FAIL("expected a FileError");
        } catch (const FileError& e) {
            CHECK(std::string(e.what()).find("not a rejects file") != std::string::npos);
        }
        CHECK(read_lines(target).front() == before);
    }
    // An earlier rejects file there is replaced.
    write_file(dir, "catalogue.csv.rejects.tsv", "line\treason\trecord\n9\told\tx\n");
    const Catalogue c = read_catalogue({.path = path.string(), .max_reject_fraction = 1.0, .rejects_path = ""});
    CHECK(c.summary.rejected == 1);
    const auto lines = read_lines(notes);
    REQUIRE(lines.size() == 2);
    CHECK(lines[1].rfind("3\t", 0) == 0);
}
