// GET / (the console page) and GET /console/{asset} (its style, script and icon):
// the page a shop owner or analyst opens in a browser. The files are
// compiled into the program (server/console/, cmake/embed_file.cmake), hold
// no data and need no token; the page asks the /v1 routes for everything,
// so it obeys the same access rules (server/access.hpp) as any other client.
// Content-Security-Policy (W3C CSP Level 3) allows only this origin.
#include <string>
#include <string_view>

#include "generated/console_css.hpp"
#include "generated/console_icon_svg.hpp"
#include "generated/console_index_html.hpp"
#include "generated/console_js.hpp"
#include "server/app.hpp"

namespace credence::server {

namespace {

// Only this origin: no inline script or style, no frames, no form posts, no
// request to any other host (connect-src covers fetch).
constexpr const char* kConsolePolicy =
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self'; connect-src 'self'; "
    "base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

// Sets the body and the headers every console file carries. `document` is
// one of the embedded files, which live as long as the program.
void answer_file(httplib::Response& res, std::string_view document, const char* content_type) {
    res.set_header("Content-Security-Policy", kConsolePolicy);
    res.set_header("X-Content-Type-Options", "nosniff");
    res.set_header("Referrer-Policy", "no-referrer");
    // Small and compiled in: a browser revalidates each time, so a new
    // program version shows its own page at once.
    res.set_header("Cache-Control", "no-cache");
    res.set_content(document.data(), document.size(), content_type);
}

}  // namespace

void install_console_routes(httplib::Server& server, AppContext& ctx) {
    server.Get("/", wrap_route(ctx, "/", [](const httplib::Request&, httplib::Response& res) {
                   answer_file(res, embedded::console_index_html(), "text/html; charset=utf-8");
               }));
    server.Get(R"(/console/([^/]+))",
               wrap_route(ctx, "/console/{asset}", [](const httplib::Request& req, httplib::Response& res) {
                   const std::string& asset = req.matches[1].str();
                   if (asset == "console.css") return answer_file(res, embedded::console_css(), "text/css; charset=utf-8");
                   if (asset == "console.js")
                       return answer_file(res, embedded::console_js(), "text/javascript; charset=utf-8");
                   if (asset == "icon.svg") return answer_file(res, embedded::console_icon_svg(), "image/svg+xml");
                   throw not_found("asset", "the console has no file '" + asset +
                                                "'; it serves console.css, console.js and icon.svg");
               }));
}

}  // namespace credence::server
