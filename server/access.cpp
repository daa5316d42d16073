#include "server/access.hpp"

#include <algorithm>
#include <cctype>
#include <fstream>
#include <set>
#include <sstream>
#include <stdexcept>

#include <httplib.h>
#include <xxhash.h>

#include "model/error.hpp"
#include "server/problem.hpp"
#include "server/request_gate.hpp"

namespace credence::server {

namespace {

constexpr size_t kMinTokenChars = 32;

// The one table of what each route needs (patterns as wrap_route names them).
const std::vector<std::pair<std::string_view, uint8_t>> kRoutePermissions = {
    {"/v1/health", kOpen},
    {"/v1/ready", kOpen},
    {"/v1/openapi.json", kOpen},
    {"/v1/model", kRead},
    {"/v1/items", kRead},
    {"/v1/items/{item}", kRead},
    {"/v1/items/{item}/similar", kRead},
    {"/v1/recommendations", kRead},
    {"/v1/users/{user}/recommendations", kCustomers},
    {"/v1/predictions", kCustomers},
    {"/metrics", kMetrics},
    {"/v1/admin/reload", kAdmin},
    {"/v1/admin/forget", kAdmin},
};

constexpr std::pair<std::string_view, uint8_t> kPermissionNames[] = {
    {"read", kRead}, {"customers", kCustomers}, {"metrics", kMetrics}};

void digest_of(std::string_view text, uint64_t out[2]) {
    const XXH128_hash_t h = XXH3_128bits(text.data(), text.size());
    out[0] = h.low64;
    out[1] = h.high64;
}

bool valid_name(std::string_view name) {
    return !name.empty() && name.size() <= 64 && std::all_of(name.begin(), name.end(), [](char c) {
        return std::isalnum(static_cast<unsigned char>(c)) || c == '.' || c == '_' || c == '-';
    });
}

}  // namespace

const std::vector<std::pair<std::string_view, uint8_t>>& route_permissions() { return kRoutePermissions; }

uint8_t route_permission(std::string_view route) {
    for (const auto& [pattern, needed] : kRoutePermissions)
        if (pattern == route) return needed;
    throw std::out_of_range("route_permission: no entry for route " + std::string(route));
}

std::string permission_names(uint8_t permissions) {
    std::string out;
    for (const auto& [name, bit] : kPermissionNames) {
        if (!(permissions & bit)) continue;
        if (!out.empty()) out += ",";
        out += name;
    }
    return out;
}

uint8_t parse_permissions(std::string_view text) {
    uint8_t permissions = 0;
    size_t start = 0;
    while (start <= text.size()) {
        const size_t comma = std::min(text.find(',', start), text.size());
        const std::string_view word = text.substr(start, comma - start);
        const auto* found = std::find_if(std::begin(kPermissionNames), std::end(kPermissionNames),
                                         [&](const auto& entry) { return entry.first == word; });
        if (found == std::end(kPermissionNames))
            throw OptionError("unknown permission '" + std::string(word) + "'; use read, customers or metrics");
        permissions |= found->second;
        start = comma + 1;
    }
    return permissions;
}

ApiTokens ApiTokens::parse(std::string_view text, const std::string& where) {
    ApiTokens tokens;
    std::set<std::string> names;
    std::istringstream lines{std::string(text)};
    std::string line;
    for (size_t number = 1; std::getline(lines, line); ++number) {
        const std::string at = where + " line " + std::to_string(number);
        if (const auto hash = line.find('#'); hash != std::string::npos) line.resize(hash);
        std::istringstream words(line);
        std::string name, permissions, secret, extra;
        if (!(words >> name)) continue;  // blank or comment
        if (!(words >> permissions >> secret) || (words >> extra))
            throw OptionError(at + ": expected 'NAME PERMISSIONS TOKEN' (three words)");
        if (!valid_name(name))
            throw OptionError(at + ": the token name must be 1-64 letters, digits, '.', '_' or '-'");
        ApiToken token;
        token.name = name;
        try {
            token.permissions = parse_permissions(permissions);
        } catch (const OptionError& e) {
            throw OptionError(at + ": " + e.what());
        }
        if (secret.size() < kMinTokenChars ||
            !std::all_of(secret.begin(), secret.end(), [](char c) { return c > 0x20 && c < 0x7f; }))
            throw OptionError(at + ": token '" + name + "' must be at least " + std::to_string(kMinTokenChars) +
                              " printable characters (e.g. openssl rand -hex 32)");
        if (!names.insert(name).second) throw OptionError(at + ": token name '" + name + "' appears twice");
        token.secret = secret;
        digest_of(secret, token.digest);
        for (const auto& other : tokens.tokens_)
            if (other.secret == secret)
                throw OptionError(at + ": token '" + name + "' has the same secret as '" + other.name + "'");
        tokens.tokens_.push_back(std::move(token));
    }
    return tokens;
}

ApiTokens ApiTokens::load(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    if (!in) throw FileError("serve: cannot read the API token file " + path);
    std::ostringstream text;
    text << in.rdbuf();
    if (in.bad()) throw FileError("serve: cannot read the API token file " + path);
    return parse(text.str(), "API token file " + path);
}

const ApiToken* ApiTokens::match(std::string_view presented) const {
    uint64_t digest[2];
    digest_of(presented, digest);
    const ApiToken* found = nullptr;
    for (const auto& token : tokens_) {
        // No early exit inside a comparison: the time does not depend on how
        // much of a guess is right.
        const uint64_t diff = (digest[0] ^ token.digest[0]) | (digest[1] ^ token.digest[1]);
        const bool same = diff == 0 && presented.size() == token.secret.size();
        if (same && !found) found = &token;
    }
    // A digest match is confirmed on the bytes (digests are not secret-keyed).
    if (found) {
        unsigned char diff = 0;
        for (size_t k = 0; k < presented.size(); ++k)
            diff |= static_cast<unsigned char>(presented[k] ^ found->secret[k]);
        if (diff != 0) return nullptr;
    }
    return found;
}

void AccessPolicy::configure(const ServeOptions& options, ApiTokens tokens) {
    auth_off_ = options.read_auth == "off";
    auth_always_ = options.read_auth == "required" || (options.read_auth == "auto" && !is_loopback_host(options.host));
    metrics_open_ = options.metrics_access == "open";
    if (auth_always_ && tokens.empty())
        throw OptionError(options.read_auth == "required"
                              ? "serve: read_auth is \"required\" but no API tokens are configured; set api_tokens_file"
                              : "serve: host " + options.host +
                                    " is not a loopback address, so the read routes need API tokens (read_auth = "
                                    "\"auto\"); set api_tokens_file, or read_auth = \"off\" to let anyone who "
                                    "reaches the port read every customer's recommendations");
    replace_tokens(std::move(tokens));
}

void AccessPolicy::replace_tokens(ApiTokens tokens) {
    auto next = std::make_shared<const ApiTokens>(std::move(tokens));
    std::lock_guard lock(mutex_);
    tokens_.swap(next);
}

bool AccessPolicy::tokens_required(const httplib::Request& req) const {
    if (auth_off_) return false;
    if (auth_always_) return true;
    return req.has_header("X-Forwarded-For") || req.has_header("Forwarded");
}

std::string AccessPolicy::check(const httplib::Request& req, httplib::Response& res, uint8_t needed) const {
    if (needed == kOpen || needed == kAdmin) return {};
    if (needed == kMetrics && metrics_open_) return {};
    const std::string header = req.get_header_value("Authorization");
    if (header.empty()) {
        if (!tokens_required(req)) return {};
        res.set_header("WWW-Authenticate", "Bearer realm=\"credence\"");
        throw HttpProblem(401, "token-required", "Unauthorized",
                          "this route needs an API token: send 'Authorization: Bearer <token>'");
    }
    std::shared_ptr<const ApiTokens> tokens;
    {
        std::lock_guard lock(mutex_);
        tokens = tokens_;
    }
    const ApiToken* token = nullptr;
    if (header.size() > 7 && header.compare(0, 7, "Bearer ") == 0) token = tokens->match(std::string_view(header).substr(7));
    if (!token) {
        res.set_header("WWW-Authenticate", "Bearer realm=\"credence\", error=\"invalid_token\"");
        throw HttpProblem(401, "invalid-token", "Unauthorized",
                          "the API token is not valid; send 'Authorization: Bearer <token>' with a current token");
    }
    if ((token->permissions & needed) != needed)
        throw HttpProblem(403, "permission-missing", "Forbidden",
                          "token '" + token->name + "' lacks the " + permission_names(needed) +
                              " permission this route needs");
    return token->name;
}

}  // namespace credence::server
