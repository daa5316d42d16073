// Runs the built `credence` program as a user would and captures what it
// printed, for end-to-end tests of the command line.
#pragma once
#include <sys/wait.h>

#include <cstdio>
#include <filesystem>
#include <fstream>
#include <sstream>
#include <string>

#include "tests/support/paths.hpp"

namespace credence::testing {

inline std::string quoted(const std::filesystem::path& p) {
    std::string q(1, '\'');
    q.append(p.string()).push_back('\'');
    return q;
}

struct CommandResult {
    int exit_code = -1;
    std::string out;  // stdout
    std::string err;  // stderr
};

// `args` is appended to the binary's path as shell words; quote them yourself.
// stdin is /dev/null, so the program sees no terminal. `environment`, when
// not empty, is "NAME=value ..." words for env(1), set for this run only.
inline CommandResult run_credence_with_env(const std::string& environment, const std::string& args) {
    static int counter = 0;
    const auto err_path = std::filesystem::temp_directory_path() /
                          ("credence-test-stderr-" + std::to_string(::getpid()) + "-" + std::to_string(counter++));
    // Built with append: GCC 12 warns falsely (-Wrestrict) on chains of "'" + string.
    std::string command;
    if (!environment.empty()) command.append("env ").append(environment).append(" ");
    command.append(quoted(credence_binary())).append(" ").append(args).append(" </dev/null 2>").append(quoted(err_path));
    CommandResult r;
    FILE* pipe = popen(command.c_str(), "r");
    if (!pipe) return r;
    char buffer[4096];
    size_t got;
    while ((got = fread(buffer, 1, sizeof buffer, pipe)) > 0) r.out.append(buffer, got);
    const int status = pclose(pipe);
    r.exit_code = WIFEXITED(status) ? WEXITSTATUS(status) : -1;
    std::ifstream in(err_path);
    std::stringstream ss;
    ss << in.rdbuf();
    r.err = ss.str();
    std::filesystem::remove(err_path);
    return r;
}

inline CommandResult run_credence(const std::string& args) { return run_credence_with_env("", args); }


}  // namespace credence::testing
