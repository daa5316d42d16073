// Tests for model/csv_reader: RFC 4180 quoting, line ends, BOM, malformed
// records and their recovery, independence from where buffer refills fall,
// and delimiter detection. Quoting rules: RFC 4180 section 2.
#include <catch2/catch.hpp>

#include <cstdio>
#include <memory>
#include <string>
#include <vector>

#include "model/data/csv_reader.hpp"

using credence::CsvProblem;
using credence::CsvReader;
using credence::CsvRecord;

namespace {

struct Row {
    std::vector<std::string> fields;
    std::string raw;
    uint64_t line;
    CsvProblem problem;
    bool operator==(const Row&) const = default;
};

using File = std::unique_ptr<std::FILE, int (*)(std::FILE*)>;

File memory_file(const std::string& text) {
    // fmemopen on an empty buffer is undefined; tmpfile works for every input.
    File f(std::tmpfile(), &std::fclose);
    REQUIRE(f);
    if (!text.empty()) REQUIRE(std::fwrite(text.data(), 1, text.size(), f.get()) == text.size());
    std::rewind(f.get());
    return f;
}

std::vector<Row> read_all(const std::string& text, char delimiter = ',', size_t buffer_bytes = 1 << 16,
                          size_t max_record_bytes = 1 << 12, std::string* seen = nullptr) {
    auto f = memory_file(text);
    CsvReader reader(f.get(), [&](std::string_view chunk) { if (seen) seen->append(chunk); }, buffer_bytes,
                     max_record_bytes);
    reader.set_delimiter(delimiter);
    std::vector<Row> rows;
    CsvRecord r;
    while (reader.next(r)) {
        Row row{{}, std::string(r.raw), r.line, r.problem};
        for (auto f : r.fields) row.fields.emplace_back(f);
        rows.push_back(std::move(row));
    }
    return rows;
}

using Fields = std::vector<std::string>;

}  // namespace

TEST_CASE("quoted fields: delimiters, doubled quotes and empty quotes") {
    const auto rows = read_all("a,\"b,c\",\"say \"\"hi\"\"\",\"\"\n");
    REQUIRE(rows.size() == 1);
    CHECK(rows[0].fields == Fields{"a", "b,c", "say \"hi\"", ""});
    CHECK(rows[0].raw == "a,\"b,c\",\"say \"\"hi\"\"\",\"\"");
    CHECK(rows[0].problem == CsvProblem::none);
}

TEST_CASE("line breaks inside quotes belong to the field and advance the line count") {
    const auto rows = read_all("1,\"two\nlines\",3\n4,\"x\r\ny\nz\",6\n7,8,9");
    REQUIRE(rows.size() == 3);
    CHECK(rows[0].fields == Fields{"1", "two\nlines", "3"});
    CHECK(rows[0].line == 1);
    CHECK(rows[1].fields == Fields{"4", "x\r\ny\nz", "6"});
    CHECK(rows[1].line == 3);
    CHECK(rows[2].fields == Fields{"7", "8", "9"});  // last record without a line end
    CHECK(rows[2].line == 6);
}

TEST_CASE("CRLF, LF and lone CR all end records; the raw text has no line end") {
    const auto rows = read_all("a,b\r\nc,d\ne,f\rg,h\r\n");
    REQUIRE(rows.size() == 4);
    CHECK(rows[0].fields == Fields{"a", "b"});
    CHECK(rows[0].raw == "a,b");
    CHECK(rows[1].fields == Fields{"c", "d"});
    CHECK(rows[2].fields == Fields{"e", "f"});
    CHECK(rows[3].fields == Fields{"g", "h"});
    CHECK(rows[3].line == 4);
}

TEST_CASE("empty fields, trailing delimiters and blank lines") {
    const auto rows = read_all("a,,\n\n,x\n");
    REQUIRE(rows.size() == 3);
    CHECK(rows[0].fields == Fields{"a", "", ""});
    CHECK(rows[1].fields == Fields{""});
    CHECK(rows[1].raw.empty());
    CHECK(rows[1].line == 2);
    CHECK(rows[2].fields == Fields{"", "x"});
    CHECK(read_all("").empty());
}

TEST_CASE("a UTF-8 byte order mark is skipped but still seen by the byte hook") {
    const std::string text = "\xEF\xBB\xBFuser\titem\n";
    std::string seen;
    const auto rows = read_all(text, '\t', 1 << 16, 1 << 12, &seen);
    REQUIRE(rows.size() == 1);
    CHECK(rows[0].fields == Fields{"user", "item"});
    CHECK(seen == text);
}

TEST_CASE("an unterminated quote costs its first line only; reading resumes after it") {
    const auto rows = read_all("1,2,3\n4,\"5,6\n7,8,9\n");
    REQUIRE(rows.size() == 3);
    CHECK(rows[1].problem == CsvProblem::unterminated_quote);
    CHECK(rows[1].line == 2);
    CHECK(rows[1].raw == "4,\"5,6");
    CHECK(rows[1].fields.empty());
    CHECK(rows[2].fields == Fields{"7", "8", "9"});
    CHECK(rows[2].line == 3);
}

TEST_CASE("text after a closing quote is reported with the whole record") {
    const auto rows = read_all("\"ab\"c,d\nx,y\n");
    REQUIRE(rows.size() == 2);
    CHECK(rows[0].problem == CsvProblem::text_after_quote);
    CHECK(rows[0].raw == "\"ab\"c,d");
    CHECK(rows[1].fields == Fields{"x", "y"});
    CHECK(rows[1].problem == CsvProblem::none);
}

TEST_CASE("a record longer than the limit is reported and skipped to the next line") {
    // max_record_bytes = 64: a quote opened on line 2 runs on for 300 bytes
    // over several lines before the file goes on normally.
    std::string text = "a,b\nc,\"" + std::string(100, 'x') + "\n" + std::string(100, 'y') + "\n" +
                       std::string(100, 'z') + "\nd,e\n";
    const auto rows = read_all(text, ',', 128, 64);
    REQUIRE(rows.size() >= 3);
    CHECK(rows[0].fields == Fields{"a", "b"});
    CHECK(rows[1].problem == CsvProblem::record_too_long);
    CHECK(rows[1].line == 2);
    CHECK(rows[1].raw == "c,\"" + std::string(100, 'x'));
    // Lines 3 and 4 are unquoted single fields now; line 5 reads normally.
    REQUIRE(rows.size() == 5);
    CHECK(rows[2].line == 3);
    CHECK(rows[2].fields == Fields{std::string(100, 'y')});
    CHECK(rows[4].fields == Fields{"d", "e"});
    CHECK(rows[4].line == 5);

    // A single line longer than the whole buffer: reported with its text
    // (up to 4096 bytes are kept) and skipped past.
    const std::string huge(1000, 'w');
    const auto rows2 = read_all("a,b\n" + huge + "\nd,e\n", ',', 128, 64);
    REQUIRE(rows2.size() == 3);
    CHECK(rows2[1].problem == CsvProblem::record_too_long);
    CHECK(rows2[1].raw == huge);
    CHECK(rows2[2].fields == Fields{"d", "e"});
    CHECK(rows2[2].line == 3);
    const std::string huger(10000, 'v');
    const auto rows3 = read_all(huger + "\nd,e\n", ',', 128, 64);
    REQUIRE(rows3.size() == 2);
    CHECK(rows3[0].raw == huger.substr(0, 4096));
    CHECK(rows3[1].fields == Fields{"d", "e"});
}

TEST_CASE("results do not depend on where buffer refills fall") {
    // A mix of every construct, long enough to cross many refills of a small
    // buffer; each small buffer size must give exactly the large-buffer result,
    // and the byte hook must see the input exactly once.
    std::string text;
    for (int i = 0; i < 60; ++i) {
        text += "cust-" + std::to_string(i) + ",\"sku \"\"" + std::to_string(i % 7) + "\"\", big\"," +
                std::to_string(i % 5) + ".5\r\n";
        if (i % 9 == 0) text += "\"multi\nline\",x,\"\"\n";
        if (i % 13 == 0) text += "\n";
        if (i % 17 == 0) text += "q,\"bad\"z,1\n";
    }
    text += "tail,\"unclosed,2\nlast,row,3";
    const auto reference = read_all(text, ',', 1 << 20, 1 << 12);
    REQUIRE(reference.size() > 60);
    for (size_t buffer = 128; buffer <= 400; buffer += 1) {
        std::string seen;
        const auto rows = read_all(text, ',', buffer, 64, &seen);
        REQUIRE(rows == reference);
        REQUIRE(seen == text);
    }
}

TEST_CASE("records longer than the first buffer are read whole once the buffer grows toward its capacity") {
    // The buffer starts at initial_buffer_bytes (64 KiB) and grows while input
    // keeps coming; a 300 KiB field and a long file after it read as with a
    // buffer that large from the start, and the byte hook sees every byte once.
    const std::string wide(300 * 1024, 'w');
    std::string text = "a,\"";
    text.append(wide).append("\",1\n");
    for (int i = 0; i < 20000; ++i)
        text.append("c").append(std::to_string(i)).append(",p").append(std::to_string(i % 97)).append(",4\n");
    static_assert(CsvReader::initial_buffer_bytes < 300 * 1024);
    std::string seen;
    const auto rows = read_all(text, ',', CsvReader::default_buffer_bytes, CsvReader::default_max_record_bytes, &seen);
    REQUIRE(rows.size() == 20001);
    CHECK(rows[0].problem == CsvProblem::none);
    CHECK(rows[0].fields == Fields{"a", wide, "1"});
    CHECK(rows[20000].fields == Fields{"c19999", "p17", "4"});
    CHECK(rows[20000].line == 20001);
    CHECK(seen == text);
}

TEST_CASE("peek shows the start without consuming it") {
    auto f = memory_file("\xEF\xBB\xBFx;y\n1;2\n");
    CsvReader reader(f.get());
    CHECK(reader.peek() == "x;y\n1;2\n");
    reader.set_delimiter(';');
    CsvRecord r;
    REQUIRE(reader.next(r));
    CHECK(r.fields.size() == 2);
    CHECK(r.fields[0] == "x");
    CHECK(reader.had_bom());
    REQUIRE(reader.next(r));
    CHECK(r.fields[1] == "2");
    CHECK_FALSE(reader.next(r));
    CHECK(reader.bytes_read() == 11);  // 3 BOM bytes + 8
}

TEST_CASE("delimiter detection") {
    using credence::detect_delimiter;
    CHECK(detect_delimiter("user,item,rating\n1,2,3\n") == ',');
    CHECK(detect_delimiter("user\titem\trating\n1\t2\t3\n") == '\t');
    CHECK(detect_delimiter("user;item;rating\n1;2;3,5\n") == ';');  // ',' is not on every line
    CHECK(detect_delimiter("user|item|rating\n") == '|');
    CHECK(detect_delimiter("\"a,b,c\";x;y\n\"d,e,f\";1;2\n") == ';');  // quoted commas do not count
    CHECK(detect_delimiter("a;b,c\nd;e,f,g\n") == ';');                // consistent beats more frequent
    CHECK(detect_delimiter("a,b,c;d\nx,y\n") == ',');                  // nothing consistent: most on line 1
    CHECK_FALSE(detect_delimiter("justoneword\nanother\n").has_value());
    CHECK_FALSE(detect_delimiter("").has_value());
}

TEST_CASE("a quoted field running over more lines than the limit costs its first line; the rest is read") {
    // A stray quote opens a field on line 2 and a quote 20 lines later would
    // close it: with the limit of 8 lines, line 2 is reported and reading
    // resumes on line 3.
    std::string text = "a,b,1\nc,\"d,2\n";
    for (int k = 0; k < 20; ++k) text.append("u").append(std::to_string(k)).append(",i,3\n");
    text += "x,y\",4\n";
    auto f = memory_file(text);
    CsvReader reader(f.get(), {}, 1 << 16, 1 << 12);
    CsvRecord r;
    std::vector<std::pair<uint64_t, CsvProblem>> seen;
    std::vector<uint64_t> ends;
    while (reader.next(r)) {
        seen.emplace_back(r.line, r.problem);
        ends.push_back(r.end_line);
    }
    REQUIRE(seen.size() == 23);
    CHECK(seen[1] == std::pair<uint64_t, CsvProblem>{2, CsvProblem::too_many_lines});
    for (size_t k = 2; k < seen.size(); ++k) {
        CHECK(seen[k].first == k + 1);
        CHECK(seen[k].second == CsvProblem::none);
        CHECK(ends[k] == k + 1);
    }
}

TEST_CASE("a quoted line break within the limit keeps the record whole and gives its last line") {
    auto f = memory_file("id,note\n1,\"two\nlines\nthree\"\n2,x\n");
    CsvReader reader(f.get(), {}, 1 << 16, 1 << 12);
    reader.set_max_record_lines(3);
    CsvRecord r;
    REQUIRE(reader.next(r));
    REQUIRE(reader.next(r));
    CHECK(r.problem == CsvProblem::none);
    CHECK(r.line == 2);
    CHECK(r.end_line == 4);
    REQUIRE(reader.next(r));
    CHECK(r.line == 5);
    CHECK_THROWS_AS(reader.set_max_record_lines(0), std::invalid_argument);
    // One line more than the limit is malformed.
    auto g = memory_file("1,\"a\nb\nc\nd\"\n");
    CsvReader strict(g.get(), {}, 1 << 16, 1 << 12);
    strict.set_max_record_lines(3);
    REQUIRE(strict.next(r));
    CHECK(r.problem == CsvProblem::too_many_lines);
    CHECK(r.end_line == 1);
}
