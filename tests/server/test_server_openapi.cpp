// Tests that the OpenAPI document travels inside the program: a copy of the
// built `credence` in a directory of its own, outside the source and build
// trees (as in the Docker image), serves server/openapi.json byte for byte.
#include <catch2/catch.hpp>

#include <unistd.h>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <functional>
#include <iterator>
#include <sstream>
#include <string>

#include "model/posterior/posterior_file.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/server_process.hpp"
#include "tests/support/simulate.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;

namespace {

std::string read_bytes(const fs::path& path) {
    std::ifstream in(path, std::ios::binary);
    std::ostringstream bytes;
    bytes << in.rdbuf();
    return bytes.str();
}

bool is_inside(const fs::path& path, const fs::path& tree) {
    const auto relative = fs::weakly_canonical(path).lexically_relative(fs::weakly_canonical(tree));
    return !relative.empty() && *relative.begin() != "..";
}

}  // namespace

TEST_CASE("a copy of the program far from the source tree serves the OpenAPI document it was built with") {
    // A fresh directory in the system temp dir (scratch_dir() would be inside the build tree).
    const fs::path dir = fs::temp_directory_path() / ("credence-openapi-test-" + std::to_string(::getpid()));
    fs::remove_all(dir);
    fs::create_directories(dir);
    REQUIRE_FALSE(is_inside(dir, source_dir()));
    REQUIRE_FALSE(is_inside(dir, CREDENCE_BUILD_DIR));

    const fs::path program = dir / "credence";
    fs::copy_file(credence_binary(), program);
    write_posterior(simulate_posterior({.users = 12, .items = 30, .rank = 2, .samples = 4, .chains = 2}),
                    (dir / "shop.posterior").string());
    const std::string document = read_bytes(source_dir() / "server" / "openapi.json");
    REQUIRE(document.size() > 1000);

    {
        ServerProcess server(dir, dir / "shop.posterior", "", program);
        auto client = server.client();
        const auto answer = client->Get("/v1/openapi.json");
        REQUIRE(answer);
        INFO(server.log());
        CHECK(answer->status == 200);
        CHECK(answer->get_header_value("Content-Type") == "application/json");
        CHECK(answer->body == document);
        CHECK(server.stop() == 0);
        // The start-up log names the version CMake's project() declares.
        CHECK(server.log().find(std::string("credence ") + CREDENCE_PROJECT_VERSION + " serving") != std::string::npos);
    }

    // The bytes are in the program itself. A server that read the file at run
    // time could still find it by an absolute path into the source tree; this
    // check fails for such a build.
    const std::string binary = read_bytes(program);
    const auto found = std::search(binary.begin(), binary.end(),
                                   std::boyer_moore_horspool_searcher(document.begin(), document.end()));
    CHECK(found != binary.end());
    fs::remove_all(dir);
}
