// Where tests find the source tree, the built program and the shared
// open dataset. The dataset lives outside the repository (../shared/datasets
// relative to the project root) and is never committed.
#pragma once
#include <cstdlib>
#include <filesystem>
#include <iostream>
#include <string>

namespace credence::testing {

inline std::filesystem::path source_dir() { return CREDENCE_SOURCE_DIR; }
inline std::filesystem::path credence_binary() { return CREDENCE_BINARY; }

// Where tests keep what a person should look at afterwards (screenshots):
// <build>/test-artifacts, created on first use.
inline std::filesystem::path artifacts_dir() {
    auto p = std::filesystem::path(CREDENCE_BUILD_DIR) / "test-artifacts";
    std::filesystem::create_directories(p);
    return p;
}

// The MovieLens small ratings file, or an empty path with a visible notice
// on stderr when it is absent (a user's clone has no ../shared).
inline std::filesystem::path open_ratings_dataset() {
    auto p = source_dir().parent_path() / "shared" / "datasets" / "movielens-latest-small" / "ratings.csv";
    if (const char* env = std::getenv("CREDENCE_DATASET")) p = env;
    if (!std::filesystem::exists(p)) {
        std::cerr << "NOTICE: open dataset not found at " << p
                  << "; skipping the real-data check (CI has it)\n";
        return {};
    }
    return p;
}

// A fresh scratch directory under the build tree (<build>/test-scratch/name,
// whatever the working directory), removed first if present.
inline std::filesystem::path scratch_dir(const std::string& name) {
    auto p = std::filesystem::path(CREDENCE_BUILD_DIR) / "test-scratch" / name;
    std::filesystem::remove_all(p);
    std::filesystem::create_directories(p);
    return p;
}

}  // namespace credence::testing
