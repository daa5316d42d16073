// credence: the one command-line program. Each subcommand lives in
// cli/<name>_command.cpp; this file only dispatches and turns errors into
// messages and exit codes (0 success, 1 failure a user can fix, 2 usage).
#include <iostream>
#include <map>

#include "cli/commands.hpp"
#include "generated/credence_version.hpp"
#include "model/error.hpp"

int main(int argc, char** argv) {
    CLI::App app{"credence: Bayesian matrix factorization recommender with honest uncertainty"};
    app.require_subcommand(1);
    app.set_version_flag("--version", std::string("credence ") + credence::kCredenceVersion);

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

    try {
        app.parse(argc, argv);
    } catch (const CLI::ParseError& e) {
        return app.exit(e);
    }
    for (auto& [sub, runner] : runners) {
        if (!sub->parsed()) continue;
        try {
            return runner();
        } catch (const credence::Error& e) {
            std::cerr << "credence " << sub->get_name() << ": " << e.what() << "\n";
            return 1;
        } catch (const std::invalid_argument& e) {
            std::cerr << "credence " << sub->get_name() << ": " << e.what() << "\n";
            return 2;
        } catch (const std::exception& e) {
            std::cerr << "credence " << sub->get_name() << ": unexpected failure: " << e.what() << "\n";
            return 1;
        }
    }
    return 2;
}
