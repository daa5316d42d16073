// Tests for cli/forget_command.cpp: `credence forget` removes one customer's
// rows from a CSV export, keeps every other row byte for byte, reports counts
// without naming the customer, and leaves the file alone when it has nothing.
#include <catch2/catch.hpp>

#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "tests/support/paths.hpp"
#include "tests/support/run_command.hpp"

using namespace credence;
using namespace credence::testing;

namespace {

std::string slurp(const std::filesystem::path& path) {
    std::ifstream in(path, std::ios::binary);
    std::stringstream s;
    s << in.rdbuf();
    return s.str();
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
    CHECK(slurp(path) == "customer_id,product_sku,stars\n"
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
    CHECK(slurp(path) == text);
    const auto one = run_credence("forget --ratings " + path.string() + " --customer tf-0002 --customer-column 1 --no-header");
    INFO(one.err);
    REQUIRE(one.exit_code == 0);
    CHECK(one.out.find("removed 1 rows (1 lines)") != std::string::npos);
    CHECK(slurp(path) == "mug-0001\ttf-0001\t4\n");
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
