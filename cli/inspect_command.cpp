// credence inspect: what a posterior file holds; --json prints the summary
// GET /v1/model answers (model/posterior/model_summary.hpp) for scripts.
#include <iostream>
#include <memory>

#include "cli/commands.hpp"
#include "model/posterior/model_summary.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/posterior/posterior_summary.hpp"

namespace credence::cli {

Runner add_inspect_command(CLI::App& app) {
    auto path = std::make_shared<std::string>();
    auto json = std::make_shared<bool>(false);
    CLI::App* cmd = app.add_subcommand("inspect", "Summarize a posterior file (validates every checksum)");
    cmd->add_option("model", *path, "Posterior file")->required();
    cmd->add_flag("--json", *json, "Print the summary GET /v1/model answers, as one JSON object");
    return [path, json] {
        const Posterior p = read_posterior(*path);
        if (*json)
            std::cout << model_summary(p).dump(2, ' ', false, nlohmann::json::error_handler_t::replace) << "\n";
        else
            std::cout << describe_posterior(p, *path);
        return 0;
    };
}

}  // namespace credence::cli
