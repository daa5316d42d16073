// Subcommand registration. Each cli/<name>_command.cpp adds one subcommand to
// the CLI11 app and returns the function that runs it once parsing succeeded.
// Runners return the process exit code; they throw credence::Error for
// failures a user can fix (main prints the message and exits 1).
#pragma once
#include <CLI/CLI.hpp>
#include <functional>

namespace credence::cli {

using Runner = std::function<int()>;

Runner add_fit_command(CLI::App& app);
Runner add_evaluate_command(CLI::App& app);
Runner add_predict_command(CLI::App& app);
Runner add_recommend_command(CLI::App& app);
Runner add_inspect_command(CLI::App& app);
Runner add_demo_data_command(CLI::App& app);
Runner add_serve_command(CLI::App& app);
Runner add_compare_command(CLI::App& app);
Runner add_report_command(CLI::App& app);

}  // namespace credence::cli
