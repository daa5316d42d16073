// Subcommand registration. Each cli/<name>_command.cpp adds one subcommand to
// the CLI11 app and returns the function that runs it once parsing succeeded.
// Runners return the process exit code; they throw credence::OptionError for
// an option value that cannot work (main exits 2), another credence::Error
// for a data or file problem a user can fix (main exits 1), and
// std::logic_error only for a bug (main exits 70). See cli/main.cpp.
#pragma once
#include <CLI/CLI.hpp>
#include <functional>

namespace credence::cli {

using Runner = std::function<int()>;

// The exit code a runner returns itself, beside those main derives from
// exceptions (0, 1, 2, 70; the table is in cli/main.cpp): fit --gate
// refused to replace the live model.
inline constexpr int kExitGateRefused = 3;

Runner add_fit_command(CLI::App& app);
Runner add_evaluate_command(CLI::App& app);
Runner add_predict_command(CLI::App& app);
Runner add_recommend_command(CLI::App& app);
Runner add_inspect_command(CLI::App& app);
Runner add_demo_data_command(CLI::App& app);
Runner add_serve_command(CLI::App& app);
Runner add_compare_command(CLI::App& app);
Runner add_report_command(CLI::App& app);
Runner add_delta_command(CLI::App& app);
Runner add_forget_command(CLI::App& app);

}  // namespace credence::cli
