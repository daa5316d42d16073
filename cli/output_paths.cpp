#include "cli/output_paths.hpp"

#include <filesystem>
#include <system_error>

#include <fmt/format.h>
#include <unistd.h>

#include "model/data/postgresql_source.hpp"
#include "model/data/sqlite_source.hpp"
#include "model/error.hpp"

namespace credence::cli {

namespace fs = std::filesystem;

namespace {

bool is_file_source(const std::string& path) {
    return !path.empty() && path != "-" && !is_sqlite_source(path) && !is_postgresql_source(path);
}

bool same_file(const std::string& a, const std::string& b) {
    std::error_code ec;
    if (fs::exists(a, ec) && fs::exists(b, ec)) {
        const bool same = fs::equivalent(a, b, ec);
        if (!ec) return same;
    }
    const fs::path ca = fs::weakly_canonical(fs::absolute(a, ec), ec);
    const fs::path cb = fs::weakly_canonical(fs::absolute(b, ec), ec);
    return ca.lexically_normal() == cb.lexically_normal();
}

}  // namespace

void refuse_overwriting_inputs(const NamedPath& output, const std::vector<NamedPath>& inputs) {
    if (!is_file_source(output.path)) return;
    for (const NamedPath& input : inputs) {
        if (!is_file_source(input.path) || !same_file(output.path, input.path)) continue;
        throw OptionError(fmt::format("{} {} is the same file as {} ({}); writing there would replace an input. "
                                      "Give {} another path",
                                      output.flag, output.path, input.flag, input.path, output.flag));
    }
}

void check_output_folder(const NamedPath& output) {
    std::error_code ec;
    if (fs::is_directory(output.path, ec))
        throw FileError(fmt::format("{} {} is a folder; give a file path inside it", output.flag, output.path));
    fs::path folder = fs::path(output.path).parent_path();
    if (folder.empty()) folder = ".";
    if (!fs::is_directory(folder, ec))
        throw FileError(fmt::format("{} {}: the folder {} does not exist; create it or choose another path",
                                    output.flag, output.path, folder.string()));
    if (::access(folder.c_str(), W_OK) != 0)
        throw FileError(fmt::format("{} {}: the folder {} is not writable; choose another path", output.flag,
                                    output.path, folder.string()));
}

}  // namespace credence::cli
