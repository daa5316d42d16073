// Tests for cli/forget_command.cpp: `credence forget` removes one customer's
// rows from a CSV export, keeps every other row byte for byte, reports counts
// without naming the customer, and leaves the file alone when it has nothing.
// It matches rows as ingest reads them (ids trimmed, the header and customer
// column found by ingest's rules, so files fit --holdout-out writes work),
// keeps the file's permissions, rewrites the real file behind a symbolic
// link, and refuses an out-of-range column or a file with other names.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "model/data/holdout.hpp"
#include "model/data/ingest.hpp"
#include "model/error.hpp"
#include "tests/support/demo_fit.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence;
using namespace credence::testing;
namespace fs = std::filesystem;

namespace {

fs::perms access_bits(const fs::path& path) { return fs::status(path).permissions() & fs::perms::all; }

// Whether a refit would still see `customer` in `path`: ingest it as fit does.
bool ingest_sees(const fs::path& path, const std::string& customer) {
    IngestOptions o;
    o.path = path.string();
    o.rejects_path = path.string() + ".rejects.tsv";
    o.max_reject_fraction = 1.0;
    return ingest_ratings(o).ratings.users.find(customer).has_value();
}

}  // namespace

TEST_CASE("forget removes every row of one customer, quoted or multi-line, and keeps the rest byte for byte") {
    const auto dir = scratch_dir("forget_command");
    const auto path = dir / "ratings.csv";
    std::ofstream(path, std::ios::binary) << "customer_id,product_sku,stars\n"
                                             "tf-0007,mug-0001,4\n"
                                             "tf-0008,mug-0001,5\n"
                                             "\"tf-0007\",\"candle, tall\",3\n"
                                             "tf-0009,\"note\nbook\",2\n"
                                             "tf-0007,\"two\nlines\",1\n"
                                             "tf-00070,mug-0002,5\n";
    const auto result = run_credence("forget --ratings " + path.string() + " --customer tf-0007");
    INFO(result.err);
    REQUIRE(result.exit_code == 0);
    CHECK(result.out.find("removed 3 rows (4 lines)") != std::string::npos);
    CHECK(result.out.find("3 rows kept") != std::string::npos);
    CHECK(result.out.find("tf-0007") == std::string::npos);  // the id stays out of the output
    CHECK(file_bytes(path) == "customer_id,product_sku,stars\n"
                         "tf-0008,mug-0001,5\n"
                         "tf-0009,\"note\nbook\",2\n"
                         "tf-00070,mug-0002,5\n");
}

TEST_CASE("forget by column index on a headerless TSV, and a customer with no rows leaves the file untouched") {
    const auto dir = scratch_dir("forget_command_tsv");
    const auto path = dir / "ratings.tsv";
    const std::string text = "mug-0001\ttf-0001\t4\r\nmug-0002\ttf-0002\t5\r\n";
    std::ofstream(path, std::ios::binary) << text;
    const auto none = run_credence("forget --ratings " + path.string() + " --customer tf-0404 --customer-column 1 --no-header");
    REQUIRE(none.exit_code == 0);
    CHECK(none.out.find("nothing removed") != std::string::npos);
    CHECK(file_bytes(path) == text);
    const auto one = run_credence("forget --ratings " + path.string() + " --customer tf-0002 --customer-column 1 --no-header");
    INFO(one.err);
    REQUIRE(one.exit_code == 0);
    CHECK(one.out.find("removed 1 rows (1 lines)") != std::string::npos);
    CHECK(file_bytes(path) == "mug-0001\ttf-0001\t4\n");
    const auto missing_column = run_credence("forget --ratings " + path.string() + " --customer x --customer-column shopper --no-header");
    CHECK(missing_column.exit_code == 2);
    const auto missing_file = run_credence("forget --ratings " + (dir / "absent.csv").string() + " --customer x");
    CHECK(missing_file.exit_code == 1);
}

TEST_CASE("forget refuses a database source and says to delete the rows in the database, without naming the customer") {
    const auto dir = scratch_dir("forget_command_database");
    for (const std::string& source : {"sqlite:" + (dir / "shop.db").string(), std::string("postgresql://shop@127.0.0.1/shop")}) {
        INFO(source);
        const auto r = run_credence("forget --ratings '" + source + "' --customer tf-0007");
        CHECK(r.exit_code == 2);
        CHECK(r.err.find("delete the customer's rows there") != std::string::npos);
        CHECK(r.err.find("tf-0007") == std::string::npos);
    }
    CHECK_FALSE(std::filesystem::exists(dir / "shop.db"));
}

TEST_CASE("forget keeps the export's permissions: a file only its owner may read stays so") {
    const auto dir = scratch_dir("forget_command_mode");
    for (const auto mode : {fs::perms::owner_read | fs::perms::owner_write,
                            fs::perms::owner_read | fs::perms::owner_write | fs::perms::group_read}) {
        const auto path = dir / "ratings.csv";
        std::ofstream(path, std::ios::binary) << "customer_id,product_sku,stars\nc-00001,tea-0001,4\nc-00002,tea-0001,5\n";
        fs::permissions(path, mode);
        const auto r = run_credence("forget --ratings " + quoted(path) + " --customer c-00001");
        INFO(r.err);
        REQUIRE(r.exit_code == 0);
        CHECK(r.out.find("removed 1 rows") != std::string::npos);
        CHECK(file_bytes(path) == "customer_id,product_sku,stars\nc-00002,tea-0001,5\n");
        CHECK(access_bits(path) == mode);
        CHECK(fs::directory_iterator(dir)->path() == path);  // no temporary file left beside it
    }
}

TEST_CASE("forget through a symbolic link cleans the real export and the link keeps pointing at it") {
    const auto dir = scratch_dir("forget_command_link");
    fs::create_directories(dir / "exports");
    const auto real = dir / "exports" / "ratings.csv";
    std::ofstream(real, std::ios::binary) << "customer_id,product_sku,stars\nc-00001,tea-0001,4\nc-00002,tea-0001,5\n"
                                             "c-00001,tea-0002,3\n";
    fs::permissions(real, fs::perms::owner_read | fs::perms::owner_write);
    const auto link = dir / "latest.csv";
    fs::create_symlink(fs::path("exports") / "ratings.csv", link);
    const auto r = run_credence("forget --ratings " + quoted(link) + " --customer c-00001");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.out.find("removed 2 rows") != std::string::npos);
    CHECK(r.out.find("rewritten at " + fs::canonical(real).string()) != std::string::npos);
    REQUIRE(fs::is_symlink(link));
    CHECK(fs::read_symlink(link) == fs::path("exports") / "ratings.csv");
    CHECK(file_bytes(real) == "customer_id,product_sku,stars\nc-00002,tea-0001,5\n");
    CHECK(access_bits(real) == (fs::perms::owner_read | fs::perms::owner_write));
    CHECK_FALSE(ingest_sees(real, "c-00001"));
    // Nothing was left in either folder but the export and the link.
    CHECK(std::distance(fs::directory_iterator(dir / "exports"), fs::directory_iterator()) == 1);
}

TEST_CASE("forget refuses an export with several names, since the other names would keep the rows") {
    const auto dir = scratch_dir("forget_command_hard_link");
    const auto path = dir / "ratings.csv";
    const std::string text = "customer_id,product_sku,stars\nc-00001,tea-0001,4\nc-00002,tea-0001,5\n";
    std::ofstream(path, std::ios::binary) << text;
    fs::create_hard_link(path, dir / "backup.csv");
    const auto r = run_credence("forget --ratings " + quoted(path) + " --customer c-00001");
    CHECK(r.exit_code == 1);
    CHECK(r.err.find("hard links") != std::string::npos);
    CHECK(r.err.find("c-00001") == std::string::npos);
    CHECK(file_bytes(path) == text);
    CHECK(fs::equivalent(path, dir / "backup.csv"));
}

TEST_CASE("forget matches ids as ingest reads them: spaces and tabs around an id do not hide its rows") {
    const auto dir = scratch_dir("forget_command_trim");
    const auto path = dir / "ratings.csv";
    std::ofstream(path, std::ios::binary) << "customer_id,product_sku,stars\n"
                                             "c-00001 ,tea-0001,4\n"
                                             " c-00001,tea-0002,5\n"
                                             "\tc-00001\t,tea-0003,3\n"
                                             "\" c-00001 \",tea-0004,2\n"
                                             "c-00002,tea-0001,5\n"
                                             "c-00001x,tea-0001,1\n"
                                             "c 00001,tea-0001,1\n";
    REQUIRE(ingest_sees(path, "c-00001"));
    const auto r = run_credence("forget --ratings " + quoted(path) + " --customer c-00001");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.out.find("removed 4 rows (4 lines)") != std::string::npos);
    CHECK(file_bytes(path) == "customer_id,product_sku,stars\nc-00002,tea-0001,5\nc-00001x,tea-0001,1\nc 00001,tea-0001,1\n");
    CHECK_FALSE(ingest_sees(path, "c-00001"));
    // An id given with blanks around it is no id ingest keeps: a usage error, nothing touched.
    const std::string before = file_bytes(path);
    const auto padded = run_credence("forget --ratings " + quoted(path) + " --customer ' c-00002'");
    CHECK(padded.exit_code == 2);
    CHECK(padded.err.find("spaces or tabs") != std::string::npos);
    CHECK(file_bytes(path) == before);
}

TEST_CASE("forget with a customer column beyond the row is an error, as in ingest, and changes nothing") {
    const auto dir = scratch_dir("forget_command_column_range");
    const auto path = dir / "ratings.csv";
    const std::string text = "c-00001,tea-0001,4,2024-05-01\nc-00002,tea-0001,5,2024-05-02\n";
    std::ofstream(path, std::ios::binary) << text;
    for (const std::string& header : {std::string(" --no-header"), std::string()}) {
        const auto r = run_credence("forget --ratings " + quoted(path) + " --customer c-00001 --customer-column 5" + header);
        INFO(r.err);
        CHECK(r.exit_code == 1);
        CHECK(r.err.find("index 5 is out of range") != std::string::npos);
        CHECK(r.err.find("--customer-column") != std::string::npos);
        CHECK(r.err.find("c-00001") == std::string::npos);
        CHECK(file_bytes(path) == text);
    }
    // The same file with the right index: the first row is data, and it goes too.
    const auto ok = run_credence("forget --ratings " + quoted(path) + " --customer c-00001 --customer-column 0");
    INFO(ok.err);
    REQUIRE(ok.exit_code == 0);
    CHECK(file_bytes(path) == "c-00002,tea-0001,5,2024-05-02\n");
}

TEST_CASE("forget finds the customer column of the files Credence writes and of headerless exports, as fit does") {
    const auto dir = scratch_dir("forget_command_columns");
    // The held-out file of fit --holdout-out, written by the same code.
    IdMap users, items;
    const uint32_t c1 = users.intern("c-00001"), c2 = users.intern("c-00002");
    const uint32_t t1 = items.intern("tea-0001"), t2 = items.intern("tea-0002");
    const auto held = dir / "held-out.csv";
    write_ratings_csv({{c1, t1, 4.0f}, {c2, t1, 5.0f}, {c1, t2, 2.5f}}, users, items, held.string());
    REQUIRE(file_bytes(held).rfind("customer,product,rating\n", 0) == 0);
    auto r = run_credence("forget --ratings " + quoted(held) + " --customer c-00001");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.out.find("removed 2 rows") != std::string::npos);
    CHECK_FALSE(ingest_sees(held, "c-00001"));
    CHECK(ingest_sees(held, "c-00002"));

    // A headerless export, as fit reads it without --no-header: its first row is a row.
    const auto bare = dir / "bare.csv";
    std::ofstream(bare, std::ios::binary) << "c-00001,tea-0001,4\nc-00002,tea-0001,5\nc-00001,tea-0002,3\n";
    r = run_credence("forget --ratings " + quoted(bare) + " --customer c-00001");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(r.out.find("removed 2 rows") != std::string::npos);
    CHECK(file_bytes(bare) == "c-00002,tea-0001,5\n");

    // Another header name ingest recognises, after a blank line, in another column.
    const auto shop = dir / "shop.tsv";
    std::ofstream(shop, std::ios::binary) << "\nsku\tBuyer ID\tscore\ntea-0001\tc-00001\t4\ntea-0001\tc-00002\t5\n";
    r = run_credence("forget --ratings " + quoted(shop) + " --customer c-00001");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(file_bytes(shop) == "\nsku\tBuyer ID\tscore\ntea-0001\tc-00002\t5\n");

    // A header whose customer column ingest cannot recognise: an error naming the option, nothing touched.
    const auto odd = dir / "odd.csv";
    std::ofstream(odd, std::ios::binary) << "who,what,stars\nc-00001,tea-0001,4\n";
    r = run_credence("forget --ratings " + quoted(odd) + " --customer c-00001");
    CHECK(r.exit_code == 1);
    CHECK(r.err.find("--customer-column") != std::string::npos);
    CHECK(file_bytes(odd) == "who,what,stars\nc-00001,tea-0001,4\n");
    r = run_credence("forget --ratings " + quoted(odd) + " --customer c-00001 --customer-column who");
    INFO(r.err);
    REQUIRE(r.exit_code == 0);
    CHECK(file_bytes(odd) == "who,what,stars\n");
}
