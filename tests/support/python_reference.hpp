// Runs an outside-reference Python script (scipy/numpy under /usr/bin/python3)
// from a test. Tests call scipy_available() first and skip with a visible
// NOTICE when it is false, so a machine without scipy still builds and runs.
#pragma once
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iostream>
#include <string>

namespace credence::testing {

inline bool scipy_available() {
    const int rc = std::system("/usr/bin/python3 -c 'import numpy, scipy' >/dev/null 2>&1");
    if (rc != 0)
        std::cerr << "NOTICE: /usr/bin/python3 with numpy and scipy not found; "
                     "skipping the outside-reference cross-check\n";
    return rc == 0;
}

// Writes `script` to dir/name, runs it with `args`, returns its stdout.
// Returns an empty string when the script fails (its stderr goes to ours).
inline std::string run_python(const std::filesystem::path& dir, const std::string& name,
                              const std::string& script, const std::string& args) {
    const auto path = dir / name;
    std::ofstream(path) << script;
    const std::string command = "/usr/bin/python3 '" + path.string() + "' " + args;
    FILE* pipe = popen(command.c_str(), "r");
    if (!pipe) return {};
    std::string out;
    char buffer[4096];
    size_t got;
    while ((got = fread(buffer, 1, sizeof buffer, pipe)) > 0) out.append(buffer, got);
    if (pclose(pipe) != 0) return {};
    return out;
}

// Runs `python3 -c script` (the script must not contain a single quote) and
// returns its stdout, or "" when python, numpy or scipy is missing or it fails.
inline std::string run_python_inline(const std::string& script) {
    std::string command("/usr/bin/python3 -c '");
    command.append(script).append("' 2>/dev/null");
    FILE* pipe = popen(command.c_str(), "r");
    if (!pipe) return {};
    std::string out;
    char buffer[512];
    while (fgets(buffer, sizeof buffer, pipe)) out += buffer;
    if (pclose(pipe) != 0) return {};
    return out;
}

}  // namespace credence::testing
