// credence serve: the HTTP service. Options come from the config file first
// (--config), then from flags; the admin token never comes from a flag.
#include <memory>
#include <optional>

#include "cli/commands.hpp"
#include "server/server.hpp"

namespace credence::cli {

namespace {
struct ServeFlags {
    std::string config;
    std::optional<std::string> model, host, model_dir;
    std::optional<uint16_t> port;
    std::optional<uint32_t> threads;
};
}  // namespace

Runner add_serve_command(CLI::App& app) {
    auto f = std::make_shared<ServeFlags>();
    CLI::App* cmd = app.add_subcommand("serve", "Serve a posterior file over HTTP (JSON under /v1, metrics at /metrics)");
    cmd->add_option("--config,-c", f->config, "TOML config file (see config/credence.toml); flags override it")
        ->check(CLI::ExistingFile);
    cmd->add_option("--model,-m", f->model, "Posterior file to serve");
    cmd->add_option("--host", f->host, "Address to bind (default 127.0.0.1)");
    cmd->add_option("--port,-p", f->port, "Port to bind (default 8080; 0 picks a free port)");
    cmd->add_option("--threads", f->threads, "Worker threads (default: max(16, 4 x cores))");
    cmd->add_option("--model-dir", f->model_dir, "Directory that admin reloads may name files in");
    cmd->footer("The admin bearer token is read from the file named by admin_token_file in the config, "
                "or from the CREDENCE_ADMIN_TOKEN environment variable; never from the command line.");
    return [f] {
        server::ServeOptions o;
        if (!f->config.empty()) o = server::load_serve_config(f->config, o);
        if (f->model) o.model_path = *f->model;
        if (f->host) o.host = *f->host;
        if (f->port) o.port = *f->port;
        if (f->threads) o.threads = *f->threads;
        if (f->model_dir) o.model_dir = *f->model_dir;
        server::validate_serve_options(o);
        return server::run_server(o);
    };
}

}  // namespace credence::cli
