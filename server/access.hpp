// Who may call which route: named API tokens with permissions, and the one
// table of what each route needs. Used by wrap_route (server/app.cpp) for
// every request, by run_server to load the tokens (at start and on SIGHUP)
// and by the tests. Bearer tokens per RFC 6750.
//
// Permissions (README "Security" explains the threat model):
//   read       routes that name no customer: the model summary, products,
//              similar products, recommendations for a visitor whose ratings
//              the caller sends;
//   customers  routes keyed by a customer id (their recommendations and
//              predictions): the answers reveal that the id is a customer and,
//              through exclude_rated and items=, which products they rated;
//   metrics    GET /metrics (when metrics_access = "token").
// The admin routes keep their own token (admin_token_file).
#pragma once
#include <cstdint>
#include <memory>
#include <mutex>
#include <string>
#include <string_view>
#include <vector>

#include "server/config.hpp"

namespace httplib {
struct Request;
struct Response;
}  // namespace httplib

namespace credence::server {

enum Permission : uint8_t {
    kOpen = 0,           // no permission needed
    kRead = 1,
    kCustomers = 2,
    kMetrics = 4,
    kAdmin = 8,          // checked by the admin routes themselves (admin token)
};

// What a route pattern (as wrap_route names it) needs. Throws
// std::out_of_range for a pattern not in the table: every route must be
// listed (a programming error otherwise).
uint8_t route_permission(std::string_view route);
// Every (route pattern, permission) in the table, for tests and the README.
const std::vector<std::pair<std::string_view, uint8_t>>& route_permissions();

// "read,customers" and back. parse_permissions throws OptionError naming an
// unknown word.
std::string permission_names(uint8_t permissions);
uint8_t parse_permissions(std::string_view text);

struct ApiToken {
    std::string name;         // shown in logs and metrics; never the secret
    uint8_t permissions = 0;
    std::string secret;
    uint64_t digest[2] = {0, 0};  // XXH3-128 of the secret, for comparison in constant time
};

class ApiTokens {
public:
    // Parses the token file's text: one "NAME PERMISSIONS TOKEN" per line,
    // '#' comments and blank lines allowed. NAME is 1-64 of [A-Za-z0-9._-],
    // PERMISSIONS a comma list (read, customers, metrics), TOKEN at least 32
    // printable ASCII characters without spaces. Throws OptionError naming
    // `where` and the line for anything else, a repeated name or a repeated token.
    static ApiTokens parse(std::string_view text, const std::string& where);
    // Reads and parses a file. Throws FileError when it cannot be read.
    static ApiTokens load(const std::string& path);

    // The token whose secret equals `presented`, or nullptr. Takes the same
    // time whichever token matches and however much of a guess is right:
    // every token's digest is compared in full.
    const ApiToken* match(std::string_view presented) const;
    size_t size() const { return tokens_.size(); }
    bool empty() const { return tokens_.empty(); }

private:
    std::vector<ApiToken> tokens_;
};

// The access rules of one server: options and the current tokens.
class AccessPolicy {
public:
    // Sets the rules from the options (read_auth, metrics_access, host) and
    // the tokens. Checks they can work: "required", or "auto" on an address
    // that is not loopback, need at least one token. Throws OptionError
    // saying what to configure. Call once, before serving.
    void configure(const ServeOptions& options, ApiTokens tokens);

    // Swaps in new tokens (SIGHUP); requests in flight finish with the old.
    void replace_tokens(ApiTokens tokens);

    // Whether a request without a token is refused: read_auth "required";
    // "auto" when the server listens off loopback or the request carries
    // X-Forwarded-For or Forwarded (it came through a proxy).
    bool tokens_required(const httplib::Request& req) const;

    // Allows the request or throws HttpProblem: 401 (with WWW-Authenticate
    // set on `res`) for a missing token where one is required or a token that
    // matches none, 403 naming the permission a valid token lacks. A request
    // that needs no token and sends none gets every permission. Returns the
    // caller's token name ("" for none).
    std::string check(const httplib::Request& req, httplib::Response& res, uint8_t needed) const;

private:
    bool auth_off_ = false;
    bool auth_always_ = false;     // "required", or "auto" off loopback
    bool metrics_open_ = false;
    mutable std::mutex mutex_;                  // guards tokens_
    std::shared_ptr<const ApiTokens> tokens_ = std::make_shared<const ApiTokens>();
};

}  // namespace credence::server
