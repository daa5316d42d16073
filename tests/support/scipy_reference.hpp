// Runs a short Python program under /usr/bin/python3 with scipy, the outside
// reference for distribution checks, feeding it input on stdin (see
// python_reference.hpp for the availability check). Returns the numbers it prints (one or
// more per line), or nothing, with a visible NOTICE, when scipy is missing.
#pragma once
#include <cstdio>
#include <cstdlib>
#include <fstream>
#include <iostream>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include "tests/support/paths.hpp"
#include "tests/support/python_reference.hpp"

namespace credence::testing {

// `program` reads its input from stdin; `input` is written there verbatim.
inline std::optional<std::vector<double>> run_scipy(const std::string& name, const std::string& program,
                                                    const std::string& input) {
    if (!scipy_available()) return std::nullopt;
    const auto dir = scratch_dir("scipy-" + name);
    std::ofstream(dir / "ref.py") << program;
    std::ofstream(dir / "in.txt") << input;
    const std::string cmd = "/usr/bin/python3 " + (dir / "ref.py").string() + " < " + (dir / "in.txt").string() +
                            " > " + (dir / "out.txt").string();
    if (std::system(cmd.c_str()) != 0) throw std::runtime_error("scipy reference program failed: " + cmd);
    std::ifstream out(dir / "out.txt");
    std::vector<double> values;
    for (double v; out >> v;) values.push_back(v);
    return values;
}

}  // namespace credence::testing
