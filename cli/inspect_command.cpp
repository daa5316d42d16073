// credence inspect: what a posterior file holds.
#include <iostream>
#include <memory>

#include "cli/commands.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/posterior/posterior_summary.hpp"

namespace credence::cli {

Runner add_inspect_command(CLI::App& app) {
    auto path = std::make_shared<std::string>();
    CLI::App* cmd = app.add_subcommand("inspect", "Summarize a posterior file (validates every checksum)");
    cmd->add_option("model", *path, "Posterior file")->required();
    return [path] {
        const Posterior p = read_posterior(*path);
        std::cout << describe_posterior(p, *path);
        return 0;
    };
}

}  // namespace credence::cli
