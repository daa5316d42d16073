// credence serve: the HTTP service. Options come from the config file first
// (--config), then from CREDENCE_SERVE_<KEY> environment variables, then from
// flags; the admin token never comes from a flag.
#include <cctype>
#include <memory>
#include <optional>
#include <string_view>
#include <utility>

#include "cli/commands.hpp"
#include "server/config.hpp"
#include "server/server.hpp"

namespace credence::cli {

namespace {

struct ServeFlags {
    std::string config;
    std::optional<std::string> model, host, model_dir;
    std::optional<uint16_t> port;
    std::optional<uint32_t> threads;
};

// A flag that overrides the [serve] key `name`: its help is the key's line
// in the config table and its default the built-in one (server/config.hpp).
template <typename T>
void add_key_flag(CLI::App& cmd, const std::string& flag, std::optional<T>& value, std::string_view name) {
    const auto& key = server::serve_config_key(name);
    std::string help(key.doc);
    help[0] = static_cast<char>(std::toupper(static_cast<unsigned char>(help[0])));
    help += " (config key " + std::string(name) + ")";
    auto* option = cmd.add_option(flag, value, help);
    if (const std::string shown = server::serve_config_value(key, server::ServeOptions{}); !shown.empty())
        option->default_str(shown);
}

}  // namespace

Runner add_serve_command(CLI::App& app) {
    auto f = std::make_shared<ServeFlags>();
    CLI::App* cmd = app.add_subcommand("serve", "Serve a posterior file over HTTP (JSON under /v1, metrics at /metrics)");
    cmd->add_option("--config,-c", f->config, "TOML config file (see config/credence.toml); flags override it");
    add_key_flag(*cmd, "--model,-m", f->model, "model");
    add_key_flag(*cmd, "--host", f->host, "host");
    add_key_flag(*cmd, "--port,-p", f->port, "port");
    add_key_flag(*cmd, "--threads", f->threads, "threads");
    add_key_flag(*cmd, "--model-dir", f->model_dir, "model_dir");
    cmd->footer("Every config key can also be set by an environment variable CREDENCE_SERVE_<KEY> (for example "
                "CREDENCE_SERVE_PORT=8080), which overrides the config file; flags override both. "
                "The admin bearer token is read from the file named by admin_token_file in the config, or from "
                "the environment variable named by admin_token_env (default " +
                server::serve_config_value(server::serve_config_key("admin_token_env"), server::ServeOptions{}) +
                "); never from the command line.");
    return [f] {
        server::ServeOptions o;
        if (!f->config.empty()) o = server::load_serve_config(f->config, o);
        o = server::apply_serve_environment(std::move(o));
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
