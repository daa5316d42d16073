// credence: the one command-line program. Each subcommand lives in
// cli/<name>_command.cpp; this file only dispatches and turns errors into
// messages and exit codes, following the taxonomy in model/error.hpp.
//
// Exit codes (also in README.md, "Exit codes", and DEVELOPERS.md):
//    0  success; also --help and --version.
//    1  a problem with the data or a file: any credence::Error except
//       OptionError (DataError, FileError, FormatError, NumericError). The
//       message names the file or row and what to do.
//    2  usage: every command-line parse error CLI11 reports (unknown flag or
//       subcommand, missing or malformed value, a value outside its range;
//       CLI11's message is printed, its own codes 105, 106, 109, ... are not
//       used), and credence::OptionError (an option value that cannot work).
//    3  refused: fit --gate did not replace the live model, because the new
//       one did not converge or is worse on held-out ratings by more than two
//       standard errors of the paired difference (kExitGateRefused in
//       cli/commands.hpp; the new model is written beside it as .candidate).
//   70  internal error: std::logic_error and its children (a broken
//       precondition between modules) and any other unexpected exception.
//       This is a bug in credence, never the user's doing; the message says
//       so and asks for a report. 70 is EX_SOFTWARE of BSD's sysexits.h.
#include <unistd.h>

#include <cstdlib>
#include <cstring>
#include <iostream>
#include <map>
#include <stdexcept>
#include <string>
#include <string_view>

#include "cli/commands.hpp"
#include "generated/credence_version.hpp"
#include "model/math/cpu_level.hpp"
#include "model/error.hpp"

namespace {

constexpr int kExitOk = 0;
constexpr int kExitDataOrFile = 1;
constexpr int kExitUsage = 2;
constexpr int kExitInternal = 70;

std::string subcommand_list(const CLI::App& app) {
    std::string out;
    for (const CLI::App* sub : app.get_subcommands({})) out += (out.empty() ? "" : ", ") + sub->get_name();
    return out;
}

// No arguments, or a first argument that is neither an option nor a
// subcommand: CLI11 would only say that a subcommand is required.
bool report_unknown_subcommand(const CLI::App& app, int argc, char** argv) {
    if (argc < 2) {
        std::cerr << "credence: give a subcommand, one of: " << subcommand_list(app)
                  << "\nRun credence --help for what each does.\n";
        return true;
    }
    const std::string_view first = argv[1];
    if (first.empty()) return false;
    if (first.front() == '-') {
        // --help and --version are the program's own; anything else before
        // the subcommand is a flag of none.
        const std::string name(first.substr(0, first.find('=')));
        if (app.get_option_no_throw(name) != nullptr) return false;
        std::cerr << "credence: " << name << " is not an option of credence itself; give a subcommand first, one of: "
                  << subcommand_list(app) << "\nRun credence --help for what each does.\n";
        return true;
    }
    for (const CLI::App* sub : app.get_subcommands({}))
        if (sub->check_name(std::string(first))) return false;
    std::cerr << "credence: '" << first << "' is not a subcommand; use one of: " << subcommand_list(app)
              << "\nRun credence --help for what each does.\n";
    return true;
}

// Prints CLI11's message (or the help and version text, which are not
// errors) and maps the outcome onto the codes above.
int parse_error_exit(CLI::App& app, const CLI::ParseError& e, int argc, char** argv) {
    if (e.get_exit_code() != static_cast<int>(CLI::ExitCodes::Success) && report_unknown_subcommand(app, argc, argv))
        return kExitUsage;
    return app.exit(e) == static_cast<int>(CLI::ExitCodes::Success) ? kExitOk : kExitUsage;
}

int internal_error(const std::string& command, const char* what) {
    std::cerr << "credence" << (command.empty() ? "" : " ") << command
              << ": internal error (a bug in credence; please report it): " << what << "\n";
    return kExitInternal;
}

// Runs one subcommand and maps what escapes it onto the codes above.
int run_reporting_errors(const std::string& command, const credence::cli::Runner& runner) {
    try {
        return runner();
    } catch (const credence::OptionError& e) {
        std::cerr << "credence " << command << ": " << e.what() << "\nRun credence " << command
                  << " --help for the options.\n";
        return kExitUsage;
    } catch (const credence::Error& e) {
        std::cerr << "credence " << command << ": " << e.what() << "\n";
        return kExitDataOrFile;
    } catch (const std::exception& e) {
        return internal_error(command, e.what());
    } catch (...) {
        return internal_error(command, "an exception that is not a std::exception");
    }
}

}  // namespace

namespace {

// `credence serve` runs its OpenMP team only for the short passes of top-N
// requests. libgomp's default keeps idle team threads spinning for a while
// after each pass, which takes CPU from the threads building answers (on a
// 2-core machine under 8 clients, measured: 270 -> 470 top-10 requests/s).
// The policy is read once, when libgomp loads, so the server starts itself
// again with OMP_WAIT_POLICY=passive unless the variable is already set
// (then the operator's choice stands). If the exec fails, it serves as is.
void serve_with_passive_waiting(int argc, char** argv) {
    if (argc < 2 || std::strcmp(argv[1], "serve") != 0 || std::getenv("OMP_WAIT_POLICY") != nullptr) return;
    if (::setenv("OMP_WAIT_POLICY", "passive", 1) != 0) return;
    ::execv("/proc/self/exe", argv);
}

}  // namespace

int main(int argc, char** argv) {
    serve_with_passive_waiting(argc, argv);
    CLI::App app{"credence: Bayesian matrix factorization recommender with honest uncertainty"};
    app.require_subcommand(1);
    // The kernels' CPU level is settled before anything runs: a bad
    // CREDENCE_CPU_LEVEL is a usage error, and --version names the level.
    std::string cpu_level;
    try {
        cpu_level = credence::cpu_level_description();
    } catch (const credence::OptionError& e) {
        std::cerr << "credence: " << e.what() << "\n";
        return kExitUsage;
    }
    app.set_version_flag("--version", std::string("credence ") + credence::kCredenceVersion + "\nkernels: " + cpu_level);
    const std::string exit_codes =
        "Exit codes: 0 ok, 1 a problem with the data or a file, 2 usage, 3 fit --gate refused the new model, "
        "70 internal error (a bug).";
    app.footer(exit_codes);

    std::map<CLI::App*, credence::cli::Runner> runners;
    auto add = [&](credence::cli::Runner (*adder)(CLI::App&)) {
        const auto before = app.get_subcommands({}).size();
        auto runner = adder(app);
        auto subs = app.get_subcommands({});
        if (subs.size() > before) runners[subs.back()] = std::move(runner);
    };
    add(credence::cli::add_fit_command);
    add(credence::cli::add_evaluate_command);
    add(credence::cli::add_predict_command);
    add(credence::cli::add_recommend_command);
    add(credence::cli::add_inspect_command);
    add(credence::cli::add_serve_command);
    add(credence::cli::add_demo_data_command);
    add(credence::cli::add_compare_command);
    add(credence::cli::add_report_command);
    add(credence::cli::add_delta_command);
    add(credence::cli::add_forget_command);
    // Every subcommand's help, and so its man page, ends with the exit codes
    // (subcommands start with the footer above; one with its own gets both).
    for (CLI::App* sub : app.get_subcommands({}))
        if (sub->get_footer() != exit_codes) sub->footer(sub->get_footer() + "\n\n" + exit_codes);

    try {
        app.parse(argc, argv);
    } catch (const CLI::ParseError& e) {
        return parse_error_exit(app, e, argc, argv);
    }
    for (auto& [sub, runner] : runners)
        if (sub->parsed()) return run_reporting_errors(sub->get_name(), runner);
    // require_subcommand(1) makes the parse fail without one.
    return internal_error("", "no subcommand ran after a successful parse");
}
