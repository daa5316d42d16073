// libFuzzer target: request handling in process. The bytes are a request as
// it arrives on a connection; they pass the request gate (head scan, head
// parse, chunked decoding) and, when it lets them through, cpp-httplib's own
// parser, the routes and the handlers answer them against a small simulated
// model, with API tokens and the admin token set. A 500 answer is a bug
// (the handlers answer every client mistake with a 4xx), so it aborts.
// Built by scripts/fuzz; seeds (one per route and framing) in
// tests/fuzz/corpus/request.
#include <cstdint>
#include <cstdlib>
#include <iostream>
#include <memory>
#include <string>
#include <variant>

#include <httplib.h>
#include <nlohmann/json.hpp>

#include "server/app.hpp"
#include "server/request_gate.hpp"
#include "tests/support/simulate.hpp"

namespace {

using namespace credence;
using namespace credence::server;

// The request as httplib reads it; the answer collected in `out`.
class StringStream final : public httplib::Stream {
public:
    explicit StringStream(std::string in) : in_(std::move(in)) {}
    bool is_readable() const override { return at_ < in_.size(); }
    bool is_writable() const override { return true; }
    ssize_t read(char* ptr, size_t size) override {
        const size_t n = std::min(size, in_.size() - at_);
        in_.copy(ptr, n, at_);
        at_ += n;
        return static_cast<ssize_t>(n);
    }
    ssize_t write(const char* ptr, size_t size) override {
        out.append(ptr, size);
        return static_cast<ssize_t>(size);
    }
    void get_remote_ip_and_port(std::string& ip, int& port) const override {
        ip = "127.0.0.1";
        port = 40000;
    }
    void get_local_ip_and_port(std::string& ip, int& port) const override {
        ip = "127.0.0.1";
        port = 8080;
    }
    socket_t socket() const override { return INVALID_SOCKET; }
    std::string out;

private:
    std::string in_;
    size_t at_ = 0;
};

class InProcessServer : public httplib::Server {
public:
    std::string answer(std::string request) {
        StringStream stream(std::move(request));
        bool closed = false;
        process_request(stream, true, closed, nullptr);
        return stream.out;
    }
};

struct World {
    AppContext ctx;
    InProcessServer server;
    std::shared_ptr<const LoadedModel> model;
    GateLimits limits{.header_line_limit_bytes = 2048,
                      .header_count_limit = 32,
                      .body_limit_bytes = 1 << 16,
                      .form_body_limit_bytes = 8192};
    World() {
        ctx.options.access_log = false;
        ctx.options.max_n = 50;
        ctx.options.max_batch = 50;
        ctx.options.topn_lanes = 1;
        ctx.admin_token = "fuzz-admin-token-0123456789abcdef";
        ctx.access.configure(ctx.options,
                             ApiTokens::parse("shop read,customers fuzz-shop-token-0123456789abcdef0123\n"
                                              "widget read fuzz-widget-token-0123456789abcdef01\n",
                                              "fuzz tokens"));
        SimulatedPosteriorOptions spec{.users = 12, .items = 30, .rank = 3, .samples = 6, .chains = 2};
        spec.id_digits = 5;
        model = build_loaded_model(std::make_shared<const Posterior>(simulate_posterior(spec)), "");
        ctx.slot.set(model);
        install_all_routes(server, ctx);
    }
};

World& world() {
    static World w;
    return w;
}

// The request the gate would hand on, or empty when it refuses the bytes.
std::string through_gate(std::string_view bytes, const GateLimits& limits) {
    // What a refusal would name: never longer than the line limit, and the
    // same method and target parse_head reads when it accepts the head.
    const RequestLine peeked = peek_request_line(bytes, limits);
    if (peeked.target.size() > limits.header_line_limit_bytes + 1) std::abort();
    const HeadScan scan = scan_head(bytes, limits);
    if (scan.rejection || !scan.complete) return {};
    auto parsed = parse_head(bytes.substr(0, scan.head_bytes), limits);
    if (std::holds_alternative<GateRejection>(parsed)) return {};
    const ParsedHead& head = std::get<ParsedHead>(parsed);
    if (peeked.method != head.method || peeked.target != head.target) std::abort();
    const std::string_view rest = bytes.substr(scan.head_bytes);
    std::string body;
    if (head.framing.kind == BodyFraming::Kind::length) {
        if (rest.size() < head.framing.length) return {};
        body = std::string(rest.substr(0, head.framing.length));
    } else if (head.framing.kind == BodyFraming::Kind::chunked) {
        ChunkDecoder decoder(limits);
        decoder.feed(rest, body);
        if (!decoder.done() || decoder.rejection()) return {};
        if (head.form_encoded && body.size() > limits.form_body_limit_bytes) return {};
    }
    return canonical_request(head, body);
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
    World& w = world();
    const std::string request = through_gate(std::string_view(reinterpret_cast<const char*>(data), size), w.limits);
    if (request.empty()) return 0;
    const std::string answer = w.server.answer(request);
    if (answer.rfind("HTTP/1.1 ", 0) != 0) {
        std::cerr << "no HTTP answer for:\n" << request << "\n";
        std::abort();
    }
    const int status = std::stoi(answer.substr(9, 3));
    if (status == 500) {
        std::cerr << "500 for:\n" << request << "\nanswer:\n" << answer << "\n";
        std::abort();
    }
    // Admin routes may change the model; every input starts from the same one.
    if (w.ctx.slot.get() != w.model) w.ctx.slot.set(w.model);
    return 0;
}
