// Tests for model/data/sqlite_source.cpp through ingest: a real SQLite file
// written here with the sqlite3 library; rows read like a CSV file's, NULLs
// and non-finite ratings rejected by row, the file opened read-only, and
// queries or files that cannot work refused with what to do.
#include <catch2/catch.hpp>

#include <sqlite3.h>

#include <cmath>
#include <filesystem>
#include <fstream>
#include <memory>
#include <string>
#include <vector>

#include "model/data/ingest.hpp"
#include "model/error.hpp"
#include "tests/support/paths.hpp"

using namespace credence;
namespace fs = std::filesystem;

namespace {

using Database = std::unique_ptr<sqlite3, int (*)(sqlite3*)>;

// Creates `path` afresh and runs `sql` in it (REQUIREs success).
void make_database(const fs::path& path, const std::string& sql) {
    fs::remove(path);
    sqlite3* raw = nullptr;
    REQUIRE(sqlite3_open(path.c_str(), &raw) == SQLITE_OK);
    Database db(raw, &sqlite3_close);
    char* error = nullptr;
    const int rc = sqlite3_exec(db.get(), sql.c_str(), nullptr, nullptr, &error);
    INFO((error ? error : ""));
    sqlite3_free(error);
    REQUIRE(rc == SQLITE_OK);
}

std::vector<std::string> read_lines(const fs::path& path) {
    std::ifstream in(path);
    std::vector<std::string> lines;
    for (std::string line; std::getline(in, line);) lines.push_back(line);
    return lines;
}

// The shop's ratings table with a few rows every source test shares.
const char* kShopTable =
    "CREATE TABLE ratings (customer TEXT, product TEXT, stars REAL, rated_at INTEGER);"
    "INSERT INTO ratings VALUES ('tf-0001', 'mug-0001', 4.5, 1700000000);"
    "INSERT INTO ratings VALUES ('tf-0001', 'candle-0002', 3, 1700000100);"
    "INSERT INTO ratings VALUES ('tf-0002', 'mug-0001', 5, 1700000200);"
    "INSERT INTO ratings VALUES ('tf-0003', 'thimble-0003', 2.25, 1700000300);"
    "INSERT INTO ratings VALUES ('tf-0002', 'mug-0001', 1, 1700000050);";  // an older duplicate

}  // namespace

TEST_CASE("a SQLite query's rows become the same rating set as the same rows in a CSV file") {
    const auto dir = credence::testing::scratch_dir("sqlite_source_same");
    const auto db = dir / "shop.db";
    make_database(db, kShopTable);
    const auto csv = dir / "ratings.csv";
    std::ofstream(csv) << "customer,product,stars,rated_at\n"
                          "tf-0001,mug-0001,4.5,1700000000\n"
                          "tf-0001,candle-0002,3,1700000100\n"
                          "tf-0002,mug-0001,5,1700000200\n"
                          "tf-0003,thimble-0003,2.25,1700000300\n"
                          "tf-0002,mug-0001,1,1700000050\n";

    const IngestResult from_db = ingest_ratings(IngestOptions{
        .path = "sqlite:" + db.string(), .query = "SELECT customer, product, stars, rated_at FROM ratings ORDER BY rowid"});
    const IngestResult from_csv = ingest_ratings(IngestOptions{.path = csv.string()});

    CHECK(from_db.summary.rows_read == 5);
    CHECK(from_db.summary.kept == 4);
    CHECK(from_db.summary.merged_duplicates == 1);
    CHECK(from_db.summary.rejected == 0);
    CHECK(from_db.summary.delimiter == 0);
    REQUIRE(from_db.ratings.size() == from_csv.ratings.size());
    for (size_t k = 0; k < from_csv.ratings.size(); ++k) {
        CHECK(from_db.ratings.ratings[k].user == from_csv.ratings.ratings[k].user);
        CHECK(from_db.ratings.ratings[k].item == from_csv.ratings.ratings[k].item);
        CHECK(from_db.ratings.ratings[k].value == from_csv.ratings.ratings[k].value);
    }
    for (uint32_t u = 0; u < from_csv.ratings.users.size(); ++u)
        CHECK(from_db.ratings.users.name(u) == from_csv.ratings.users.name(u));
    // The latest duplicate (by rated_at) wins, as for a file.
    const auto u2 = from_db.ratings.users.find("tf-0002");
    REQUIRE(u2);
    for (const auto& r : from_db.ratings.ratings)
        if (r.user == *u2) CHECK(r.value == 5.0f);

    // The fingerprint is of the rows and column names: stable, and it moves
    // when a value does.
    const IngestResult again = ingest_ratings(IngestOptions{
        .path = "sqlite:" + db.string(), .query = "SELECT customer, product, stars, rated_at FROM ratings ORDER BY rowid"});
    CHECK(again.summary.fingerprint == from_db.summary.fingerprint);
    CHECK(from_db.summary.fingerprint.size() == 16);
    const IngestResult other = ingest_ratings(IngestOptions{
        .path = "sqlite:" + db.string(),
        .query = "SELECT customer, product, stars + (rowid = 4) AS stars, rated_at FROM ratings ORDER BY rowid"});
    CHECK(other.summary.fingerprint != from_db.summary.fingerprint);
}

TEST_CASE("NULL ids and ratings that are not finite numbers go to the rejects file with their row and values") {
    const auto dir = credence::testing::scratch_dir("sqlite_source_rejects");
    const auto db = dir / "shop.db";
    // 1e999 is stored by SQLite as an infinite REAL.
    make_database(db, "CREATE TABLE ratings (customer TEXT, product TEXT, stars);"
                      "INSERT INTO ratings VALUES ('tf-0001', 'mug-0001', 4);"
                      "INSERT INTO ratings VALUES (NULL, 'mug-0001', 3);"
                      "INSERT INTO ratings VALUES ('tf-0002', NULL, 2);"
                      "INSERT INTO ratings VALUES ('tf-0003', 'candle-0002', NULL);"
                      "INSERT INTO ratings VALUES ('tf-0004', 'candle-0002', 1e999);"
                      "INSERT INTO ratings VALUES ('tf-0005', 'candle-0002', 'lots');"
                      "INSERT INTO ratings VALUES ('', 'candle-0002', 4);"
                      "INSERT INTO ratings VALUES ('tf-0006', 'mug-0001', 5);");
    const auto rejects = dir / "rejects.tsv";
    const IngestResult r = ingest_ratings(IngestOptions{.path = "sqlite:" + db.string(),
                                                        .query = "SELECT * FROM ratings ORDER BY rowid",
                                                        .max_reject_fraction = 1.0,
                                                        .rejects_path = rejects.string()});
    CHECK(r.summary.rows_read == 8);
    CHECK(r.summary.kept == 2);
    CHECK(r.summary.rejected == 6);
    CHECK(r.summary.rows_read == r.summary.kept + r.summary.rejected + r.summary.merged_duplicates);
    CHECK(r.summary.rejects_path == rejects.string());

    const auto lines = read_lines(rejects);
    REQUIRE(lines.size() == 7);
    CHECK(lines[0] == "row\treason\trecord");
    CHECK(lines[1] == "2\tNULL user id\tcustomer=NULL; product=mug-0001; stars=3");
    CHECK(lines[2] == "3\tNULL item id\tcustomer=tf-0002; product=NULL; stars=2");
    CHECK(lines[3] == "4\tNULL rating\tcustomer=tf-0003; product=candle-0002; stars=NULL");
    CHECK(lines[4] == "5\trating 'inf' is not finite\tcustomer=tf-0004; product=candle-0002; stars=inf");
    CHECK(lines[5].starts_with("6\trating 'lots' is not a number"));
    CHECK(lines[6] == "7\tempty user id\tcustomer=; product=candle-0002; stars=4");
}

TEST_CASE("the SQLite file is opened read-only: a query that writes fails and the table is unchanged") {
    const auto dir = credence::testing::scratch_dir("sqlite_source_readonly");
    const auto db = dir / "shop.db";
    make_database(db, kShopTable);
    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = "sqlite:" + db.string(),
                                                 .query = "DELETE FROM ratings RETURNING customer, product, stars"}),
                    DataError);
    const IngestResult after = ingest_ratings(
        IngestOptions{.path = "sqlite:" + db.string(), .query = "SELECT customer, product, stars FROM ratings"});
    CHECK(after.summary.rows_read == 5);
}

TEST_CASE("a database source without a query, a query of two statements, a missing file and a file that is not a "
          "database are refused with what to do") {
    const auto dir = credence::testing::scratch_dir("sqlite_source_refusals");
    const auto db = dir / "shop.db";
    make_database(db, kShopTable);
    const std::string source = "sqlite:" + db.string();

    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = source}), OptionError);
    CHECK_THROWS_WITH(ingest_ratings(IngestOptions{.path = source}), Catch::Contains("--query"));
    const auto csv = dir / "ratings.csv";
    std::ofstream(csv) << "customer,product,stars\ntf-0001,mug-0001,4\n";
    CHECK_THROWS_WITH(ingest_ratings(IngestOptions{.path = csv.string(), .query = "SELECT 1"}),
                      Catch::Contains("--query"));
    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = source, .query = "SELECT * FROM ratings; SELECT 1"}),
                    OptionError);
    CHECK_THROWS_WITH(ingest_ratings(IngestOptions{.path = source, .query = "SELECT * FROM orders"}),
                      Catch::Contains("no such table") && Catch::Contains("--query"));
    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = "sqlite:" + (dir / "absent.db").string(), .query = "SELECT 1"}),
                    FileError);
    const auto text = dir / "notes.db";
    std::ofstream(text) << "this is a text file, not a database, and it is long enough to have a header page\n";
    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = "sqlite:" + text.string(), .query = "SELECT * FROM ratings"}),
                    FileError);
    CHECK_THROWS_AS(ingest_ratings(IngestOptions{.path = "sqlite:", .query = "SELECT 1"}), OptionError);
}
