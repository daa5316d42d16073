#include "server/config.hpp"

#include <cstdlib>
#include <fstream>
#include <limits>
#include <set>

#include <toml++/toml.h>

#include "model/error.hpp"

namespace credence::server {

namespace {

[[noreturn]] void config_error(const std::string& path, const std::string& key, const std::string& why) {
    throw Error("config " + path + ": [serve] " + key + " " + why);
}

void read_string(const toml::table& t, const std::string& path, const char* key, std::string& out) {
    const auto* node = t.get(key);
    if (!node) return;
    if (!node->is_string()) config_error(path, key, "must be a string");
    out = node->as_string()->get();
}

void read_bool(const toml::table& t, const std::string& path, const char* key, bool& out) {
    const auto* node = t.get(key);
    if (!node) return;
    if (!node->is_boolean()) config_error(path, key, "must be true or false");
    out = node->as_boolean()->get();
}

template <typename T>
void read_uint(const toml::table& t, const std::string& path, const char* key, T& out, int64_t min_value) {
    const auto* node = t.get(key);
    if (!node) return;
    if (!node->is_integer()) config_error(path, key, "must be an integer");
    const int64_t v = node->as_integer()->get();
    if (v < min_value || static_cast<uint64_t>(v) > std::numeric_limits<T>::max())
        config_error(path, key, "is " + std::to_string(v) + ", outside [" + std::to_string(min_value) + ", " +
                                    std::to_string(std::numeric_limits<T>::max()) + "]");
    out = static_cast<T>(v);
}

}  // namespace

ServeOptions load_serve_config(const std::string& toml_path, ServeOptions base) {
    toml::table root;
    try {
        root = toml::parse_file(toml_path);
    } catch (const toml::parse_error& e) {
        throw Error("config " + toml_path + ": " + std::string(e.description()) + " at line " +
                    std::to_string(e.source().begin.line));
    }
    const auto* serve_node = root.get("serve");
    if (!serve_node) return base;  // the file may configure other commands only
    const auto* t = serve_node->as_table();
    if (!t) throw Error("config " + toml_path + ": serve must be a table ([serve])");

    static const std::set<std::string> known = {
        "model", "host", "port", "threads", "body_limit_bytes", "read_timeout_ms", "write_timeout_ms",
        "admin_token_file", "admin_token_env", "model_dir", "log_ids", "access_log", "max_n", "max_batch",
        "topn_lanes", "topn_batch_max"};
    for (const auto& [key, value] : *t)
        if (!known.count(std::string(key.str())))
            config_error(toml_path, std::string(key.str()), "is not a known option (see config/credence.toml)");

    read_string(*t, toml_path, "model", base.model_path);
    read_string(*t, toml_path, "host", base.host);
    read_uint(*t, toml_path, "port", base.port, 0);
    read_uint(*t, toml_path, "threads", base.threads, 0);
    read_uint(*t, toml_path, "body_limit_bytes", base.body_limit_bytes, 1);
    read_uint(*t, toml_path, "read_timeout_ms", base.read_timeout_ms, 1);
    read_uint(*t, toml_path, "write_timeout_ms", base.write_timeout_ms, 1);
    read_string(*t, toml_path, "admin_token_file", base.admin_token_file);
    read_string(*t, toml_path, "admin_token_env", base.admin_token_env);
    read_string(*t, toml_path, "model_dir", base.model_dir);
    read_bool(*t, toml_path, "log_ids", base.log_ids);
    read_bool(*t, toml_path, "access_log", base.access_log);
    read_uint(*t, toml_path, "max_n", base.max_n, 1);
    read_uint(*t, toml_path, "max_batch", base.max_batch, 1);
    read_uint(*t, toml_path, "topn_lanes", base.topn_lanes, 0);
    read_uint(*t, toml_path, "topn_batch_max", base.topn_batch_max, 1);
    return base;
}

void validate_serve_options(const ServeOptions& o) {
    if (o.model_path.empty()) throw Error("serve: no model given; pass --model FILE or set [serve] model");
    if (o.host.empty()) throw Error("serve: host is empty; use 127.0.0.1 for loopback");
    if (o.body_limit_bytes == 0) throw Error("serve: body_limit_bytes must be at least 1");
    if (o.read_timeout_ms == 0 || o.write_timeout_ms == 0) throw Error("serve: timeouts must be at least 1 ms");
    if (o.max_n == 0) throw Error("serve: max_n must be at least 1");
    if (o.max_batch == 0) throw Error("serve: max_batch must be at least 1");
    if (o.topn_batch_max == 0) throw Error("serve: topn_batch_max must be at least 1");
}

std::string resolve_admin_token(const ServeOptions& o) {
    std::string token;
    if (!o.admin_token_file.empty()) {
        std::ifstream in(o.admin_token_file);
        if (!in) throw Error("serve: cannot read admin token file " + o.admin_token_file);
        std::getline(in, token);
    } else if (!o.admin_token_env.empty()) {
        if (const char* env = std::getenv(o.admin_token_env.c_str())) token = env;
        else return {};
    } else {
        return {};
    }
    const auto first = token.find_first_not_of(" \t\r\n");
    const auto last = token.find_last_not_of(" \t\r\n");
    token = first == std::string::npos ? std::string() : token.substr(first, last - first + 1);
    if (token.empty())
        throw Error("serve: the admin token " +
                    (o.admin_token_file.empty() ? "variable " + o.admin_token_env : "file " + o.admin_token_file) +
                    " is empty; put a long random string in it or unset it");
    return token;
}

}  // namespace credence::server
