// Tests for model/ingest: format detection, column choice, every reject
// reason with its line number, duplicate policies, the reject limit, the
// accounting invariant on messy input, the fingerprint, the open dataset,
// rejects written or removed only over a rejects file, and the customer
// column and id trimming that forget shares.
#include <catch2/catch.hpp>
#include <sys/stat.h>

#include <algorithm>
#include <cinttypes>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <map>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include <xxhash.h>

#include "model/error.hpp"
#include "model/data/ingest.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
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

IngestOptions options_for(const fs::path& path) {
    IngestOptions o;
    o.path = path.string();
    return o;
}

// The rating for (user, item) by external ids, or NaN when absent.
float value_of(const RatingSet& set, const std::string& user, const std::string& item) {
    const auto u = set.users.find(user), i = set.items.find(item);
    if (!u || !i) return std::nanf("");
    for (const auto& r : set.ratings)
        if (r.user == *u && r.item == *i) return r.value;
    return std::nanf("");
}

bool sorted_unique(const RatingSet& set) {
    for (size_t k = 1; k < set.ratings.size(); ++k) {
        const auto& a = set.ratings[k - 1];
        const auto& b = set.ratings[k];
        if (!(a.user < b.user || (a.user == b.user && a.item < b.item))) return false;
    }
    return true;
}

void check_accounting(const IngestSummary& s) {
    CHECK(s.rows_read == s.kept + s.rejected + s.merged_duplicates);
    CHECK(s.lines_read == s.header_lines + s.blank_lines + s.row_lines);
    CHECK(s.rejected_lines >= s.rejected);
}

}  // namespace

TEST_CASE("a headed CSV: columns found by name, ids interned, result sorted") {
    const auto dir = testing::scratch_dir("ingest_basic");
    const auto path = write_file(dir, "shop.csv",
                                 "customer_id,product,stars,rated_at\n"
                                 "cust-0042,\"SKU 19/B\",4.5,1700000300\n"
                                 "cust-0007,\"Gift box, small\",3,1700000100\n"
                                 "cust-0042,\"Gift box, small\",5,1700000200\n");
    const auto result = ingest_ratings(options_for(path));
    const auto& s = result.summary;
    CHECK(s.had_header);
    CHECK(s.delimiter == ',');
    CHECK(s.rows_read == 3);
    CHECK(s.kept == 3);
    CHECK(s.rejected == 0);
    CHECK(s.rejects_path.empty());
    CHECK_FALSE(fs::exists(path.string() + ".rejects.tsv"));
    check_accounting(s);
    const auto& set = result.ratings;
    CHECK(set.users.size() == 2);
    CHECK(set.items.size() == 2);
    CHECK(set.users.name(0) == "cust-0042");  // order of first appearance
    CHECK(value_of(set, "cust-0042", "SKU 19/B") == 4.5f);
    CHECK(value_of(set, "cust-0007", "Gift box, small") == 3.0f);
    CHECK(sorted_unique(set));
    CHECK_FALSE(set.scale.declared);
    CHECK(set.scale.min == 3.0f);
    CHECK(set.scale.max == 5.0f);
    CHECK(describe(s) == "read 3 rows: kept 3, rejected 0, merged 0 duplicates");
}

TEST_CASE("long and short ids with shared prefixes stay distinct") {
    // Ids past 27 bytes take another path in the interning table; check both.
    const auto dir = testing::scratch_dir("ingest_long_ids");
    const std::string a = "customer-with-a-rather-long-identifier-0001";
    const std::string b = "customer-with-a-rather-long-identifier-0002";
    std::string text = "user,item,rating\n";
    for (int i = 0; i < 3000; ++i)  // enough distinct ids to make the table grow several times
        text += (i % 2 ? a : b) + "-" + std::to_string(i % 1500) + ",sku-" + std::to_string(i) + ",3\n";
    text += a + ",sku-0,1\n" + b + ",sku-0,2\n" + a.substr(0, 27) + ",sku-0,4\n" + a.substr(0, 26) + ",sku-0,5\n";
    const auto result = ingest_ratings(options_for(write_file(dir, "long.csv", text)));
    CHECK(result.summary.kept == 3004);
    // Rows alternate a-/b- prefixes over 1500 suffixes: 750 odd suffixes with a,
    // 750 even with b, each seen twice; plus the 4 ids of the last rows.
    CHECK(result.ratings.users.size() == 1504);
    CHECK(value_of(result.ratings, a, "sku-0") == 1.0f);
    CHECK(value_of(result.ratings, b, "sku-0") == 2.0f);
    CHECK(value_of(result.ratings, a.substr(0, 27), "sku-0") == 4.0f);
    CHECK(value_of(result.ratings, a.substr(0, 26), "sku-0") == 5.0f);
}

TEST_CASE("delimiters are detected: tab, semicolon, pipe; or given") {
    const auto dir = testing::scratch_dir("ingest_delimiters");
    for (char d : {'\t', ';', '|', ','}) {
        std::string text = std::string("user") + d + "item" + d + "rating\n";
        text += std::string("ana") + d + "lamp" + d + "2.5\n";
        text += std::string("ben") + d + "lamp" + d + "4\n";
        const auto path = write_file(dir, "d.txt", text);
        const auto result = ingest_ratings(options_for(path));
        CHECK(result.summary.delimiter == d);
        CHECK(result.summary.kept == 2);
        CHECK(value_of(result.ratings, "ana", "lamp") == 2.5f);
    }
    // Given explicitly, a delimiter is used even when another looks likelier.
    const auto path = write_file(dir, "given.txt", "a,1;b,2;3\nc,1;d,2;4\n");
    auto o = options_for(path);
    o.delimiter = ';';
    const auto result = ingest_ratings(o);
    CHECK(result.summary.delimiter == ';');
    CHECK(value_of(result.ratings, "a,1", "b,2") == 3.0f);

    const auto none = write_file(dir, "none.txt", "abc\ndef\n");
    try {
        ingest_ratings(options_for(none));
        FAIL("expected DataError");
    } catch (const DataError& e) {
        CHECK_THAT(e.what(), Catch::Contains("--delimiter") && Catch::Contains("none.txt"));
    }
}

TEST_CASE("header detection and forcing; UTF-8 BOM; CRLF") {
    const auto dir = testing::scratch_dir("ingest_header");
    const auto numeric = write_file(dir, "numeric.csv", "\xEF\xBB\xBF" "1,10,4\r\n2,10,5\r\n");
    auto result = ingest_ratings(options_for(numeric));
    CHECK_FALSE(result.summary.had_header);
    CHECK(result.summary.kept == 2);
    CHECK(value_of(result.ratings, "1", "10") == 4.0f);  // BOM not part of the first id

    const auto headed = write_file(dir, "headed.csv", "\xEF\xBB\xBFuser,item,rating\r\n1,10,4\r\n");
    result = ingest_ratings(options_for(headed));
    CHECK(result.summary.had_header);
    CHECK(result.summary.rows_read == 1);

    // Forced: a numeric first row treated as a header is not counted as data.
    auto o = options_for(numeric);
    o.has_header = true;
    o.user_column = "0";
    o.item_column = "1";
    o.rating_column = "2";
    result = ingest_ratings(o);
    CHECK(result.summary.had_header);
    CHECK(result.summary.rows_read == 1);
    CHECK(value_of(result.ratings, "2", "10") == 5.0f);
}

TEST_CASE("columns by name and by 0-based index") {
    const auto dir = testing::scratch_dir("ingest_columns");
    const auto path = write_file(dir, "cols.tsv",
                                 "note\tscore_given\tbuyer\tarticle\n"
                                 "x\t2\tcust-1\tmug\n"
                                 "y\t5\tcust-2\tmug\n");
    // Defaults recognise buyer / article / score_given.
    auto result = ingest_ratings(options_for(path));
    CHECK(value_of(result.ratings, "cust-2", "mug") == 5.0f);

    auto o = options_for(path);
    o.user_column = "article";  // by name: swap roles on purpose
    o.item_column = "buyer";
    o.rating_column = "1";      // by index
    result = ingest_ratings(o);
    CHECK(value_of(result.ratings, "mug", "cust-1") == 2.0f);

    o = options_for(path);
    o.rating_column = "stars";
    try {
        ingest_ratings(o);
        FAIL("expected DataError");
    } catch (const DataError& e) {
        CHECK_THAT(e.what(), Catch::Contains("column 'stars' not found; header has: note, score_given, buyer, article; "
                                             "pass --rating-column"));
        CHECK_THAT(e.what(), Catch::Contains("cols.tsv, line 1"));
    }

    o = options_for(path);
    o.item_column = "9";
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("index 9 is out of range") && Catch::Contains("--product-column"));

    // Without a header, names cannot be used.
    const auto bare = write_file(dir, "bare.csv", "1,2,3\n");
    o = options_for(bare);
    o.has_header = false;
    o.user_column = "user";
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("no header") && Catch::Contains("--customer-column"));

    // Unrecognised header names: say so and name the option.
    const auto odd = write_file(dir, "odd.csv", "a,b,c\nx,y,z\n");
    CHECK_THROWS_WITH(ingest_ratings(options_for(odd)),
                      Catch::Contains("no rating column recognised; header has: a, b, c; pass --rating-column"));
}

TEST_CASE("every reject reason is written with its physical line number and raw record") {
    const auto dir = testing::scratch_dir("ingest_rejects");
    const std::string text =
        "user,item,rating,timestamp\n"                       // line 1
        "ana,lamp,4,1700000000\n"                            // 2 kept
        "ben,lamp,4\n"                                       // 3 field count
        ",lamp,3,1700000000\n"                               // 4 empty user
        "ben,  ,3,1700000000\n"                              // 5 empty item
        "ben,lamp,good,1700000000\n"                         // 6 not a number
        "ben,lamp,nan,1700000000\n"                          // 7 NaN
        "ben,lamp,-inf,1700000000\n"                         // 8 infinite
        "ben,lamp,9,1700000000\n"                            // 9 outside scale
        "ben,lamp,3,yesterday\n"                             // 10 bad timestamp
        "ben,\"tea\ncup\",3,1700000000\n"                    // 11-12 an id with a line break
        "ben,\"mug\"x,3,1700000000\n"                        // 13 text after quote
        "\n"                                                 // 14 blank
        "ben,vase,,1700000000\n"                             // 15 empty rating
        "ben,vase,1e39,1700000000\n"                         // 16 beyond float range
        "ben,vase,2,\n"                                      // 17 empty timestamp
        "ben,vase,2,2024-02-30\n"                            // 18 impossible date
        "cara,\"vase\\\tpot,2,1700000000\n";                 // 19 unterminated quote
    const auto path = write_file(dir, "messy.csv", text);
    auto o = options_for(path);
    o.scale = RatingScale{1.0f, 5.0f, true};
    o.max_reject_fraction = 1.0;
    const auto result = ingest_ratings(o);
    const auto& s = result.summary;
    CHECK(s.rows_read == 16);
    CHECK(s.kept == 1);
    CHECK(s.rejected == 15);
    CHECK(s.blank_lines == 1);
    check_accounting(s);
    CHECK(s.rejects_path == path.string() + ".rejects.tsv");
    CHECK(std::isnan(value_of(result.ratings, "ben", "tea\ncup")));
    CHECK(result.ratings.scale.declared);
    CHECK(result.ratings.scale.max == 5.0f);

    const auto lines = read_lines(s.rejects_path);
    REQUIRE(lines.size() == 16);
    CHECK(lines[0] == "line\treason\trecord");
    const std::vector<std::pair<std::string, std::string>> expected{
        {"3", "expected 4 fields, found 3"},
        {"4", "empty user id"},
        {"5", "empty item id"},
        {"6", "rating 'good' is not a number"},
        {"7", "rating 'nan' is not finite"},
        {"8", "rating '-inf' is not finite"},
        {"9", "rating '9' is outside the declared scale 1 to 5"},
        {"10", "timestamp 'yesterday' is neither a number of epoch seconds nor an ISO-8601 date"},
        {"11", "item id holds a line break (a stray quote?) (lines 11-12)"},
        {"13", "text after a closing quote"},
        {"15", "empty rating"},
        {"16", "rating '1e39' is not finite"},
        {"17", "empty timestamp"},
        {"18", "timestamp '2024-02-30' is neither"},
        {"19", "unterminated quote"},
    };
    for (size_t k = 0; k < expected.size(); ++k) {
        INFO("reject " << k << ": " << lines[k + 1]);
        CHECK(lines[k + 1].rfind(expected[k].first + "\t" + expected[k].second, 0) == 0);
    }
    // The raw record is the last column, with tabs and backslashes escaped.
    CHECK(lines[1] == "3\texpected 4 fields, found 3\tben,lamp,4");
    CHECK(lines[15] == "19\tunterminated quote (a quoted field never closes)\tcara,\"vase\\\\\\tpot,2,1700000000");
}

TEST_CASE("a decimal comma is named in the reason") {
    const auto dir = testing::scratch_dir("ingest_decimal_comma");
    const auto path = write_file(dir, "eu.csv", "user;item;rating\nana;lamp;4,5\nben;lamp;3\n");
    auto o = options_for(path);
    o.max_reject_fraction = 1.0;
    const auto result = ingest_ratings(o);
    CHECK(result.summary.rejected == 1);
    const auto lines = read_lines(result.summary.rejects_path);
    REQUIRE(lines.size() == 2);
    CHECK_THAT(lines[1], Catch::Contains("rating '4,5' is not a number (decimal comma?"));
}

TEST_CASE("duplicates: latest by timestamp, file order breaking ties, and mean") {
    const auto dir = testing::scratch_dir("ingest_duplicates");
    const auto path = write_file(dir, "dups.csv",
                                 "user,item,rating,timestamp\n"
                                 "ana,lamp,1,300\n"
                                 "ana,lamp,2,100\n"   // older: loses to 300
                                 "ben,lamp,3,50\n"
                                 "ben,lamp,4,50\n"    // tie at 50: later in the file wins
                                 "ana,mug,5,10\n"
                                 "ben,lamp,2,20\n");  // older than 50: loses
    auto result = ingest_ratings(options_for(path));
    CHECK(result.summary.merged_duplicates == 3);
    CHECK(result.summary.kept == 3);
    check_accounting(result.summary);
    CHECK(value_of(result.ratings, "ana", "lamp") == 1.0f);
    CHECK(value_of(result.ratings, "ben", "lamp") == 4.0f);
    CHECK(sorted_unique(result.ratings));

    auto o = options_for(path);
    o.duplicates = DuplicatePolicy::mean;
    result = ingest_ratings(o);
    CHECK(result.summary.merged_duplicates == 3);
    CHECK(value_of(result.ratings, "ana", "lamp") == 1.5f);
    CHECK(value_of(result.ratings, "ben", "lamp") == 3.0f);  // (3 + 4 + 2) / 3
    CHECK(value_of(result.ratings, "ana", "mug") == 5.0f);

    // Without a timestamp column, the last row in the file wins.
    const auto plain = write_file(dir, "plain.csv", "user,item,rating\nana,lamp,1\nana,lamp,2\nben,mug,3\nana,lamp,5\nana,mug,4\n");
    result = ingest_ratings(options_for(plain));
    CHECK(result.summary.merged_duplicates == 2);
    CHECK(value_of(result.ratings, "ana", "lamp") == 5.0f);

    // ISO-8601 timestamps order by instant, offsets included:
    // 10:00+02:00 is 08:00Z, earlier than 09:00Z.
    const auto iso = write_file(dir, "iso.csv",
                                "user,item,rating,date\n"
                                "ana,lamp,2,2024-03-01T09:00:00Z\n"
                                "ana,lamp,5,2024-03-01T10:00:00+02:00\n"
                                "ben,lamp,1,2024-03-02\n"
                                "ben,lamp,4,2024-03-01 23:59:59.5\n");
    result = ingest_ratings(options_for(iso));
    CHECK(result.summary.rejected == 0);
    CHECK(value_of(result.ratings, "ana", "lamp") == 2.0f);
    CHECK(value_of(result.ratings, "ben", "lamp") == 1.0f);
}

TEST_CASE("the reject limit fails with counts, the first reason and the rejects path") {
    const auto dir = testing::scratch_dir("ingest_limit");
    std::string text = "user,item,rating\n";
    for (int i = 0; i < 98; ++i) text += "cust-" + std::to_string(i) + ",lamp,4\n";
    text += "cust-x,lamp,four\ncust-y,lamp\n";
    const auto path = write_file(dir, "limit.csv", text);
    try {
        ingest_ratings(options_for(path));  // default limit 1%: 2 of 100 is too many
        FAIL("expected DataError");
    } catch (const DataError& e) {
        const std::string msg = e.what();
        CHECK_THAT(msg, Catch::Contains("rejected 2 of 100 rows (2.00%), above the limit of 1.00%"));
        CHECK_THAT(msg, Catch::Contains("line 100: rating 'four' is not a number"));
        CHECK_THAT(msg, Catch::Contains(path.string() + ".rejects.tsv"));
        CHECK_THAT(msg, Catch::Contains("--max-reject-fraction"));
    }
    CHECK(read_lines(path.string() + ".rejects.tsv").size() == 3);

    auto o = options_for(path);
    o.max_reject_fraction = 0.02;  // exactly at the limit passes
    o.rejects_path = (dir / "elsewhere.tsv").string();
    const auto result = ingest_ratings(o);
    CHECK(result.summary.kept == 98);
    CHECK(result.summary.rejects_path == o.rejects_path);
    CHECK(describe(result.summary) ==
          "read 100 rows: kept 98, rejected 2, merged 0 duplicates (rejects in " + o.rejects_path + ")");
}

TEST_CASE("a file read with the wrong layout stops early instead of rejecting everything") {
    const auto dir = testing::scratch_dir("ingest_early_stop");
    std::string text = "user,item,rating\n";
    for (int i = 0; i < 5000; ++i) text += "cust-" + std::to_string(i) + ",lamp,good\n";
    const auto path = write_file(dir, "wrong.csv", text);
    try {
        ingest_ratings(options_for(path));
        FAIL("expected DataError");
    } catch (const DataError& e) {
        CHECK_THAT(e.what(), Catch::Contains("stopped after rejecting 1000 of the first 1000 rows"));
    }
    CHECK(read_lines(path.string() + ".rejects.tsv").size() == 1001);
}

TEST_CASE("accounting adds up on randomly corrupted input") {
    // A generated file with good rows (some duplicated pairs, some ids with
    // quoted commas or line breaks), every kind of bad row and blank lines.
    // The test tracks by construction which rows are good, which pairs repeat
    // and which row should win, then compares with the ingest.
    const auto dir = testing::scratch_dir("ingest_accounting");
    std::mt19937_64 rng(20240611);
    std::uniform_int_distribution<int> user_d(0, 59), item_d(0, 39), kind_d(0, 19), half_stars(2, 10),
        ts_d(0, 50);
    std::string text = "customer,sku,stars,time\n";
    uint64_t line = 2, good = 0, bad = 0, blank = 0;
    std::map<std::pair<std::string, std::string>, std::pair<int, float>> winner;  // pair -> (ts, value)
    std::vector<uint64_t> bad_lines;
    for (int row = 0; row < 20000; ++row) {
        const std::string user = "cust-" + std::to_string(user_d(rng));
        const int item_n = item_d(rng);
        std::string item = "sku-" + std::to_string(item_n), item_field = item;
        if (item_n % 10 == 0) {
            item = "set " + std::to_string(item_n) + ", boxed";
            item_field = "\"" + item + "\"";
        } else if (item_n % 10 == 1) {
            item = "two\nline " + std::to_string(item_n);  // an id with a line break: rejected
            item_field = "\"" + item + "\"";
        }
        const float value = half_stars(rng) / 2.0f;
        const int ts = ts_d(rng);
        const int kind = kind_d(rng);
        std::string rating = std::to_string(value), time = std::to_string(ts);
        std::string record;
        bool is_bad = true;
        switch (kind) {
            case 0: record = user + "," + item_field + "," + rating; break;           // field count
            case 1: record = "," + item_field + "," + rating + "," + time; break;     // empty user
            case 2: record = user + ",," + rating + "," + time; break;                // empty item
            case 3: record = user + "," + item_field + ",n/a," + time; break;         // not a number
            case 4: record = user + "," + item_field + ",inf," + time; break;         // not finite
            case 5: record = user + "," + item_field + ",7," + time; break;           // outside scale
            case 6: record = user + "," + item_field + "," + rating + ",soon"; break; // bad timestamp
            case 7: record = "\"" + user + "\"!," + item_field + "," + rating + "," + time; break;  // text after quote
            default:
                record = user + "," + item_field + "," + rating + "," + time;
                is_bad = item_n % 10 == 1;
        }
        text += record + "\n";
        if (is_bad) {
            ++bad;
            bad_lines.push_back(line);
        } else {
            ++good;
            auto [it, inserted] = winner.try_emplace({user, item}, ts, value);
            if (!inserted && ts >= it->second.first) it->second = {ts, value};  // later in file wins ties
        }
        line += 1 + static_cast<uint64_t>(std::count(record.begin(), record.end(), '\n'));
        if (row % 500 == 0) {
            text += "\n";
            ++blank;
            ++line;
        }
    }
    text += "cust-1,\"never closed,3,4\n";  // unterminated quote, last line
    ++bad;
    bad_lines.push_back(line);
    const auto path = write_file(dir, "messy.csv", text);
    auto o = options_for(path);
    o.scale = RatingScale{1.0f, 5.0f, true};
    o.max_reject_fraction = 0.5;
    const auto result = ingest_ratings(o);
    const auto& s = result.summary;
    CHECK(s.rows_read == good + bad);
    CHECK(s.rejected == bad);
    CHECK(s.kept == winner.size());
    CHECK(s.merged_duplicates == good - winner.size());
    CHECK(s.blank_lines == blank);
    check_accounting(s);
    CHECK(sorted_unique(result.ratings));

    const auto lines = read_lines(s.rejects_path);
    REQUIRE(lines.size() == bad + 1);
    for (size_t k = 0; k < bad_lines.size(); ++k) {
        INFO("reject " << k);
        REQUIRE(lines[k + 1].substr(0, lines[k + 1].find('\t')) == std::to_string(bad_lines[k]));
    }
    size_t mismatches = 0;
    for (const auto& [pair, tv] : winner)
        if (value_of(result.ratings, pair.first, pair.second) != tv.second) ++mismatches;
    CHECK(mismatches == 0);
}

TEST_CASE("fingerprint is XXH3-64 of the file bytes; progress reaches the file size") {
    const auto dir = testing::scratch_dir("ingest_fingerprint");
    // Over 4 MiB so that the file is read in several buffer fills.
    std::string text = "user,item,rating\n";
    for (int i = 0; text.size() < (size_t{9} << 20); ++i)
        text += "cust-" + std::to_string(i % 5000) + ",sku-" + std::to_string(i / 5000) + "," +
                std::to_string(1 + i % 5) + "\n";
    const auto path = write_file(dir, "big.csv", text);
    std::vector<uint64_t> done;
    auto o = options_for(path);
    o.progress = [&](uint64_t bytes_done, uint64_t bytes_total) {
        CHECK(bytes_total == text.size());
        done.push_back(bytes_done);
    };
    const auto result = ingest_ratings(o);
    // Reference: the xxhash library's one-shot XXH3_64bits over the same bytes.
    char hex[17];
    std::snprintf(hex, sizeof hex, "%016" PRIx64, static_cast<uint64_t>(XXH3_64bits(text.data(), text.size())));
    CHECK(result.summary.fingerprint == hex);
    CHECK(result.summary.fingerprint.size() == 16);
    REQUIRE(done.size() >= 3);
    CHECK(std::is_sorted(done.begin(), done.end()));
    CHECK(done.back() == text.size());

    // One changed byte changes the fingerprint.
    text[text.size() - 2] = text[text.size() - 2] == '1' ? '2' : '1';
    const auto changed = write_file(dir, "big2.csv", text);
    CHECK(ingest_ratings(options_for(changed)).summary.fingerprint != result.summary.fingerprint);
}

TEST_CASE("unreadable or empty input fails with the file named") {
    const auto dir = testing::scratch_dir("ingest_missing");
    CHECK_THROWS_WITH(ingest_ratings(options_for(dir / "absent.csv")),
                      Catch::Contains("cannot open") && Catch::Contains("absent.csv"));
    CHECK_THROWS_AS(ingest_ratings(options_for(dir / "absent.csv")), FileError);
    CHECK_THROWS_WITH(ingest_ratings(options_for(dir)), Catch::Contains("is a directory"));
    CHECK_THROWS_AS(ingest_ratings(options_for(dir)), FileError);
    const auto empty = write_file(dir, "empty.csv", "\n\n");
    CHECK_THROWS_WITH(ingest_ratings(options_for(empty)), Catch::Contains("empty.csv has no rows"));
    CHECK_THROWS_AS(ingest_ratings(options_for(empty)), DataError);
    const auto header_only = write_file(dir, "header_only.csv", "user,item,rating\n");
    CHECK_THROWS_WITH(ingest_ratings(options_for(header_only)), Catch::Contains("no ratings kept"));
    CHECK_THROWS_AS(ingest_ratings(options_for(header_only)), DataError);
}

TEST_CASE("options that cannot work are OptionError naming the flag, before the file is opened") {
    const auto dir = testing::scratch_dir("ingest_options");
    // The file does not exist: an option error must win over the file error.
    auto o = options_for(dir / "absent.csv");
    o.scale = RatingScale{5.0f, 1.0f, true};
    CHECK_THROWS_AS(ingest_ratings(o), OptionError);
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("--scale"));
    o = options_for(dir / "absent.csv");
    o.max_reject_fraction = 1.5;
    CHECK_THROWS_AS(ingest_ratings(o), OptionError);
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("--max-reject-fraction"));
    o = options_for(dir / "absent.csv");
    o.delimiter = '"';
    CHECK_THROWS_AS(ingest_ratings(o), OptionError);
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("--delimiter"));
}

TEST_CASE("an unwritable rejects file is a FileError naming --rejects-path") {
    const auto dir = testing::scratch_dir("ingest_rejects_unwritable");
    auto o = options_for(write_file(dir, "one_bad.csv", "user,item,rating\nc1,a,5\nc2,b,x\n"));
    o.max_reject_fraction = 1.0;
    o.rejects_path = (dir / "no-such-dir" / "rejects.tsv").string();
    CHECK_THROWS_AS(ingest_ratings(o), FileError);
    CHECK_THROWS_WITH(ingest_ratings(o), Catch::Contains("--rejects-path"));
}

TEST_CASE("the open ratings dataset ingests completely") {
    const auto path = testing::open_ratings_dataset();
    if (path.empty()) return;  // notice printed by open_ratings_dataset()
    // Expected counts: F. Maxwell Harper and Joseph A. Konstan, "The MovieLens
    // Datasets: History and Context", ACM TiiS 5(4), 2015; the small "latest"
    // release's README states 100,836 ratings by 610 users on 9,724 items,
    // on a 0.5 to 5.0 star scale in half-star steps.
    const auto result = ingest_ratings(options_for(path));
    const auto& s = result.summary;
    CHECK(s.had_header);
    CHECK(s.rows_read == 100836);
    CHECK(s.kept == 100836);
    CHECK(s.rejected == 0);
    CHECK(s.merged_duplicates == 0);
    CHECK(result.ratings.users.size() == 610);
    CHECK(result.ratings.items.size() == 9724);
    CHECK(result.ratings.scale.min == 0.5f);
    CHECK(result.ratings.scale.max == 5.0f);
    CHECK_FALSE(result.ratings.scale.declared);
    CHECK(sorted_unique(result.ratings));
}

TEST_CASE("a stray quote closed 40,000 lines later in a 114,316-row export costs two rows, not 40,000") {
    const auto dir = testing::scratch_dir("ingest_stray_quote");
    constexpr int kRows = 114316, kStray = 30000, kClose = kStray + 40000;
    std::string text = "customer,product,rating\n";
    text.reserve(kRows * 24);
    for (int k = 0; k < kRows; ++k) {
        const std::string user = std::string("c-").append(std::to_string(k));
        const std::string item = std::string("p-").append(std::to_string(k % 977));
        const std::string rating = std::to_string(1 + k % 5);
        text.append(user).append(k == kStray ? ",\"" : ",").append(item);  // the stray quote opens a field
        text.append(k == kClose ? "\"," : ",").append(rating).append("\n");  // a quote that would close it
    }
    const auto path = write_file(dir, "export.csv", text);
    const IngestResult r = ingest_ratings(options_for(path));
    const IngestSummary& s = r.summary;
    CHECK(s.rows_read == kRows);
    CHECK(s.rejected == 2);
    CHECK(s.kept == kRows - 2);
    CHECK(s.merged_duplicates == 0);
    CHECK(s.rows_read == s.kept + s.rejected + s.merged_duplicates);
    // Lines, counted independently from the bytes: one per line feed.
    const auto lines = static_cast<uint64_t>(std::count(text.begin(), text.end(), '\n'));
    CHECK(s.lines_read == lines);
    CHECK(s.lines_read == s.header_lines + s.blank_lines + s.row_lines);
    CHECK(s.rejected_lines == 2);
    const auto rejects = read_lines(s.rejects_path);
    REQUIRE(rejects.size() == 3);
    CHECK(rejects[1].rfind(std::to_string(kStray + 2) + "\t", 0) == 0);  // line 1 is the header
    CHECK(rejects[1].find("too many lines") != std::string::npos);
    CHECK(rejects[2].rfind(std::to_string(kClose + 2) + "\t", 0) == 0);
    CHECK(rejects[2].find("double quote") != std::string::npos);
    CHECK(value_of(r.ratings, std::string("c-").append(std::to_string(kStray + 1)),
                   std::string("p-").append(std::to_string((kStray + 1) % 977))) ==
          static_cast<float>(1 + (kStray + 1) % 5));
}

TEST_CASE("an id holding a line break is rejected with the lines it spans, and the lines add up") {
    const auto dir = testing::scratch_dir("ingest_id_line_break");
    const std::string text = "user,item,rating\nu1,i1,4\n\"u\n2\",i2,3\nu3,\"note\",5\n\nu4,i4,2\n";
    const auto path = write_file(dir, "export.csv", text);
    auto o = options_for(path);
    o.max_reject_fraction = 0.5;
    const IngestResult r = ingest_ratings(o);
    const IngestSummary& s = r.summary;
    CHECK(s.rows_read == 4);
    CHECK(s.kept == 3);
    CHECK(s.rejected == 1);
    CHECK(s.rejected_lines == 2);
    CHECK(s.blank_lines == 1);
    CHECK(s.header_lines == 1);
    CHECK(s.lines_read == static_cast<uint64_t>(std::count(text.begin(), text.end(), '\n')));
    CHECK(s.lines_read == s.header_lines + s.blank_lines + s.row_lines);
    const auto rejects = read_lines(s.rejects_path);
    REQUIRE(rejects.size() == 2);
    CHECK(rejects[1].find("user id holds a line break") != std::string::npos);
    CHECK(rejects[1].find("(lines 3-4)") != std::string::npos);
    CHECK(describe(s).find("7 lines: 1 header, 1 blank, 5 in rows (2 in rejected rows)") != std::string::npos);
}

TEST_CASE("UTF-16 and UTF-32 input is named, with or without a byte-order mark") {
    const auto dir = testing::scratch_dir("ingest_utf16");
    const std::string ascii = "user,item,rating\nu1,i1,4\n";
    auto utf16 = [&](bool little) {
        std::string out;
        for (char c : ascii) out += little ? std::string{c, '\0'} : std::string{'\0', c};
        return out;
    };
    const std::vector<std::pair<std::string, std::string>> cases = {
        {"\xFF\xFE" + utf16(true), "UTF-16 (little-endian)"},
        {"\xFE\xFF" + utf16(false), "UTF-16 (big-endian)"},
        {utf16(true), "UTF-16 (little-endian)"},
        {utf16(false), "UTF-16 (big-endian)"},
        {std::string("\xFF\xFE\0\0", 4) + "u\0\0\0", "UTF-32 (little-endian)"},
    };
    for (const auto& [bytes, name] : cases) {
        const auto path = write_file(dir, "export.csv", bytes);
        INFO(name);
        try {
            ingest_ratings(options_for(path));
            FAIL("accepted");
        } catch (const DataError& e) {
            CHECK(std::string(e.what()).find(name) != std::string::npos);
            CHECK(std::string(e.what()).find("UTF-8") != std::string::npos);
        }
    }
    const auto binary = write_file(dir, "export.bin", std::string("u,i,r\n\x01\x02\0\x03,\0,\0\n", 13));
    CHECK_THROWS_WITH(ingest_ratings(options_for(binary)), Catch::Contains("NUL bytes"));
}

TEST_CASE("input refused before the first row leaves no file open") {
    // Found by fuzz_csv_reader: a refusal in the source's constructor (UTF-16,
    // no delimiter, no rows) left the export's FILE open, one per attempt.
    const auto dir = testing::scratch_dir("ingest_refused_fd");
    const std::vector<std::pair<std::string, std::string>> cases = {
        {std::string("\xFF\xFEu\0,\0i\0", 8), "UTF-16"},
        {"justoneword\n", "delimiter"},
        {"\n \n", "no rows"},
    };
    auto open_fds = [] { return std::distance(fs::directory_iterator("/proc/self/fd"), fs::directory_iterator{}); };
    const auto before = open_fds();
    for (const auto& [bytes, what] : cases) {
        const auto path = write_file(dir, "export.csv", bytes);
        INFO(what);
        for (int attempt = 0; attempt < 20; ++attempt)
            CHECK_THROWS_WITH(ingest_ratings(options_for(path)), Catch::Contains(what));
    }
    CHECK(open_fds() == before);
}

TEST_CASE("a rejects file never holds a raw NUL byte") {
    const auto dir = testing::scratch_dir("ingest_rejects_nul");
    std::string text = "user,item,rating\n";
    for (int k = 0; k < 300; ++k) text.append("u").append(std::to_string(k)).append(",i,4\n");
    text += std::string("u-bad,i\0x,nope\n", 15);
    const auto path = write_file(dir, "export.csv", text);
    const IngestResult r = ingest_ratings(options_for(path));
    REQUIRE(r.summary.rejected == 1);
    std::ifstream in(r.summary.rejects_path, std::ios::binary);
    const std::string bytes((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    CHECK(bytes.find('\0') == std::string::npos);
    CHECK(bytes.find("i\\0x") != std::string::npos);
    CHECK(bytes.find("item id holds a NUL byte") != std::string::npos);
}

TEST_CASE("a run that rejects nothing removes the rejects file of an earlier run, or says it left it") {
    const auto dir = testing::scratch_dir("ingest_stale_rejects");
    std::string good = "user,item,rating\n";
    for (int k = 0; k < 200; ++k) good.append("u").append(std::to_string(k)).append(",i,4\n");
    const auto path = write_file(dir, "export.csv", good + "u-x,i,none\n");
    const auto first = ingest_ratings(options_for(path));
    REQUIRE(first.summary.rejected == 1);
    REQUIRE(fs::exists(first.summary.rejects_path));
    CHECK(first.summary.stale_rejects.empty());

    write_file(dir, "export.csv", good);
    const auto second = ingest_ratings(options_for(path));
    CHECK(second.summary.rejected == 0);
    CHECK_FALSE(fs::exists(path.string() + ".rejects.tsv"));
    CHECK(second.summary.stale_rejects == "removed " + path.string() + ".rejects.tsv");
    CHECK(describe(second.summary).find("removed " + path.string() + ".rejects.tsv: a rejects file from an earlier run") !=
          std::string::npos);

    // A rejects path that cannot be removed is reported, not ignored.
    IngestOptions o = options_for(path);
    o.rejects_path = (dir / "rejects-dir").string();
    fs::create_directories(dir / "rejects-dir" / "inside");
    const auto third = ingest_ratings(o);
    CHECK(third.summary.stale_rejects.rfind("left " + o.rejects_path + " (", 0) == 0);
    CHECK(fs::exists(dir / "rejects-dir"));

    // A rejects path that is not a regular file (a pipe here; /dev/null in a
    // script) is never removed: only files an earlier run wrote are.
    o.rejects_path = (dir / "rejects-pipe").string();
    fs::remove(o.rejects_path);
    REQUIRE(mkfifo(o.rejects_path.c_str(), 0600) == 0);
    const auto fourth = ingest_ratings(o);
    CHECK(fourth.summary.stale_rejects.empty());
    CHECK(fs::is_fifo(o.rejects_path));
}

TEST_CASE("a rejects path naming a file that is not a rejects file is refused before reading, and the file stays") {
    const auto dir = testing::scratch_dir("ingest_rejects_foreign");
    std::string good = "user,item,rating\n";
    for (int k = 0; k < 200; ++k) good.append("u").append(std::to_string(k)).append(",i,4\n");
    const auto clean = write_file(dir, "clean.csv", good);
    const auto messy = write_file(dir, "messy.csv", good + "u-x,i,none\n");
    const std::string notes = "customer notes, not rejects\nline two\n";
    const auto other = write_file(dir, "notes.txt", notes);
    // Nearly a rejects file: the header line must be whole, and an empty file holds no header.
    const auto near = write_file(dir, "near.tsv", "line\treason\n");
    const auto empty = write_file(dir, "empty.tsv", "");
    for (const auto& target : {other, clean, near, empty}) {
        const std::string before = target == clean ? good : target == other ? notes : target == near ? "line\treason\n" : "";
        for (const auto& input : {clean, messy}) {
            INFO(target.filename().string() << " as the rejects path of " << input.filename().string());
            auto o = options_for(input);
            o.max_reject_fraction = 1.0;
            o.rejects_path = target.string();
            try {
                ingest_ratings(o);
                FAIL("expected a FileError");
            } catch (const FileError& e) {
                CHECK_THAT(e.what(), Catch::Contains(target.string()) && Catch::Contains("not a rejects file") &&
                                         Catch::Contains("pass another --rejects-path"));
            }
            std::ifstream in(target, std::ios::binary);
            const std::string after((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
            CHECK(after == before);
        }
    }
    // The default path is guarded the same way.
    write_file(dir, "messy.csv.rejects.tsv", notes);
    auto o = options_for(messy);
    o.max_reject_fraction = 1.0;
    CHECK_THROWS_AS(ingest_ratings(o), FileError);
    CHECK(read_lines(dir / "messy.csv.rejects.tsv") == std::vector<std::string>{"customer notes, not rejects", "line two"});
}

TEST_CASE("a rejects file from an earlier run is overwritten by new rejects and removed by a clean run") {
    const auto dir = testing::scratch_dir("ingest_rejects_own");
    std::string good = "user,item,rating\n";
    for (int k = 0; k < 200; ++k) good.append("u").append(std::to_string(k)).append(",i,4\n");
    const auto clean = write_file(dir, "clean.csv", good);
    const auto messy = write_file(dir, "messy.csv", good + "u-x,i,none\n");
    for (const std::string unit : {"line", "row"}) {
        INFO(unit);
        const auto rejects = write_file(dir, "rejects.tsv", unit + "\treason\trecord\n7\told reason\told,row\n");
        REQUIRE(is_rejects_file(rejects.string()));
        auto o = options_for(messy);
        o.max_reject_fraction = 1.0;
        o.rejects_path = rejects.string();
        const auto first = ingest_ratings(o);
        CHECK(first.summary.rejected == 1);
        const auto lines = read_lines(rejects);
        REQUIRE(lines.size() == 2);
        CHECK(lines[0] == "line\treason\trecord");
        CHECK(lines[1].rfind("202\t", 0) == 0);

        o.path = clean.string();
        const auto second = ingest_ratings(o);
        CHECK(second.summary.stale_rejects == "removed " + rejects.string());
        CHECK_FALSE(fs::exists(rejects));
    }
    CHECK_FALSE(is_rejects_file((dir / "absent.tsv").string()));
    CHECK_FALSE(is_rejects_file(clean.string()));
}

TEST_CASE("the customer column is chosen as ingest chooses it, and another role's problem is no error there") {
    IngestOptions o;
    // Header detected from the rating field; defaults by name.
    auto c = choose_customer_column(o, {"sku", "customer", "stars"}, "x.csv, line 1");
    CHECK(c.has_header);
    CHECK(c.index == 1);
    // A rating column that contains "user" is taken first, as ingest takes it.
    c = choose_customer_column(o, {"user_score", "customer_ref", "item"}, "x.csv, line 1");
    CHECK(c.index == 1);
    // No header: index 0, or the one given, even when the product default would collide with it.
    c = choose_customer_column(o, {"c-1", "p-1", "4"}, "x.csv, line 1");
    CHECK_FALSE(c.has_header);
    CHECK(c.index == 0);
    o.user_column = "1";
    c = choose_customer_column(o, {"p-1", "c-1", "4"}, "x.csv, line 1");
    CHECK_FALSE(c.has_header);
    CHECK(c.index == 1);
    // The rating column given decides the header as it does for ingest.
    IngestOptions r;
    r.rating_column = "3";
    CHECK_FALSE(choose_customer_column(r, {"c-1", "p-1", "2024-01-02", "4"}, "x.csv, line 1").has_header);
    // Without it the date in field 2 makes that row look like a header, whose names match no role.
    CHECK_THROWS_AS(choose_customer_column(IngestOptions{}, {"c-1", "p-1", "2024-01-02", "4"}, "x.csv, line 1"),
                    DataError);
    // An index out of range is a DataError naming the option, without quoting a data row.
    o.user_column = "5";
    try {
        choose_customer_column(o, {"c-00001", "p-1", "4", "2024-01-02"}, "x.csv, line 1");
        FAIL("expected a DataError");
    } catch (const DataError& e) {
        CHECK_THAT(e.what(), Catch::Contains("index 5 is out of range") && Catch::Contains("--customer-column") &&
                                 Catch::Contains("x.csv, line 1"));
        CHECK_THAT(e.what(), !Catch::Contains("c-00001"));
    }
    // The same row through the whole ingest: the same message, no id in it.
    const auto dir = testing::scratch_dir("ingest_customer_column");
    auto full = options_for(write_file(dir, "bare.csv", "c-00001,p-1,4,2024-01-02\n"));
    full.user_column = "5";
    CHECK_THROWS_WITH(ingest_ratings(full), Catch::Contains("index 5 is out of range") && !Catch::Contains("c-00001"));
}

TEST_CASE("a field is trimmed of spaces and tabs only") {
    CHECK(trim_field(" \tc-00001 \t") == "c-00001");
    CHECK(trim_field("c 00001") == "c 00001");
    CHECK(trim_field("\xC2\xA0" "c") == "\xC2\xA0" "c");  // a no-break space is part of the id
    CHECK(trim_field("  ").empty());
}
