// The request gate: reads one HTTP/1.1 request's head and body off the wire
// within fixed limits before cpp-httplib sees any of it, and hands httplib a
// complete request in canonical form (one Content-Length, no Transfer-Encoding,
// no Range). Used by server/http_listener.cpp for every connection and by the
// request fuzz target. Message syntax per RFC 9112 (HTTP/1.1) and RFC 9110.
//
// Why a gate: the library buffers a header line of any length, applies no
// size limit to chunked bodies, reads a POST without Content-Length until the
// peer closes, and honours Range on every route. These functions decide all of
// that from the bytes alone; they do no I/O and hold no state between calls
// except inside a ChunkDecoder.
#pragma once
#include <cstdint>
#include <optional>
#include <string>
#include <string_view>
#include <utility>
#include <variant>
#include <vector>

namespace credence::server {

struct GateLimits {
    uint64_t header_line_limit_bytes = 8192;   // request line or one header line, line end excluded
    uint64_t header_count_limit = 100;         // header fields in the head (trailers of a chunked body count too)
    uint64_t body_limit_bytes = 8u << 20;      // decoded body, whether sized by Content-Length or chunked
    // A form-encoded body (application/x-www-form-urlencoded) is parsed into
    // query parameters by cpp-httplib, which refuses one over 8192 bytes with
    // a bare 413 (CPPHTTPLIB_FORM_URL_ENCODED_PAYLOAD_MAX_LENGTH, compiled
    // into Debian's libcpp-httplib 0.11.4); the gate refuses it first, saying so.
    uint64_t form_body_limit_bytes = 8192;
};

// Why a request was refused before it reached a route: the status to answer
// (400, 408, 413, 414, 431, 501, 505), a problem slug and a detail a client
// developer can act on. The connection is closed after the answer.
struct GateRejection {
    int status = 400;
    std::string slug;
    std::string detail;
};

// The 413 for a form-encoded body over form_body_limit_bytes.
GateRejection form_body_too_large(const GateLimits& limits);

// How far the head has arrived. `complete`: the blank line ending the head
// was found; head_bytes counts through it. Otherwise more bytes are needed,
// unless `rejection` is set: a line already longer than its limit, or too
// many lines, refuses the request before the rest arrives.
struct HeadScan {
    bool complete = false;
    size_t head_bytes = 0;
    std::optional<GateRejection> rejection;
};

// Scans `buffered` (the bytes received so far for this request, from its
// first byte) for the end of the head. Lines end in LF with an optional CR
// before it. Empty lines before the request line are skipped as RFC 9112
// section 2.2 allows. Never reads past `buffered`; costs O(size).
HeadScan scan_head(std::string_view buffered, const GateLimits& limits);

struct BodyFraming {
    enum class Kind { none, length, chunked };
    Kind kind = Kind::none;
    uint64_t length = 0;  // Kind::length only
};

struct ParsedHead {
    std::string method;
    std::string target;
    std::string version;                                       // "HTTP/1.1" or "HTTP/1.0"
    std::vector<std::pair<std::string, std::string>> fields;   // as sent, minus framing and Range fields
    BodyFraming framing;
    bool expects_continue = false;                             // Expect: 100-continue
    bool form_encoded = false;                                 // Content-Type application/x-www-form-urlencoded
};

// The method and target of a request, for the log line and the problem
// document of a request refused before parse_head accepted it.
struct RequestLine {
    std::string method;  // empty when unknown
    std::string target;  // empty when unknown
};

// Reads the request line at the start of `buffered` (after any empty lines)
// when it has arrived whole, is within the line limit as scan_head counts it
// and is well formed as parse_head requires (so for a head parse_head
// accepts, the same method and target); otherwise both fields are empty. Never
// throws except std::bad_alloc; costs O(line length).
RequestLine peek_request_line(std::string_view buffered, const GateLimits& limits);

// Parses a complete head (scan_head's head_bytes of it). Refuses, with the
// status RFC 9112 gives: a malformed request line or field (400), a version
// other than HTTP/1.0 or 1.1 (505), obsolete line folding (400), two
// Content-Length values that differ or are not digits (400), Transfer-Encoding
// together with Content-Length (400: a request smuggling vector), a transfer
// coding other than chunked (501), chunked on HTTP/1.0 (400), a declared
// length over the body limit or a form body over the form limit (413).
// Without Content-Length or Transfer-Encoding the body is empty (section 6.3).
// Range and If-Range fields are dropped: JSON answers are always whole
// (RFC 9110 section 14.2 lets a server ignore Range). Returns the rejection
// instead of throwing; never throws for any input except std::bad_alloc.
std::variant<ParsedHead, GateRejection> parse_head(std::string_view head, const GateLimits& limits);

// Decodes a chunked body (RFC 9112 section 7.1) fed in pieces of any size,
// appending the data to `body` and refusing it as soon as the decoded size
// would pass the body limit (413) or the framing is malformed (400): a chunk
// size that is not hex or overflows, a chunk-size line or trailer line longer
// than the header line limit, too many trailer fields, data not followed by
// CRLF. Trailer fields are read and dropped.
class ChunkDecoder {
public:
    explicit ChunkDecoder(const GateLimits& limits) : limits_(limits) {}

    // Consumes bytes from `input`; returns how many (all of them unless the
    // body ended inside `input`, whose remaining bytes belong to the next
    // request). Check done() and rejection() afterwards.
    size_t feed(std::string_view input, std::string& body);
    bool done() const { return state_ == State::done; }
    const std::optional<GateRejection>& rejection() const { return rejection_; }

private:
    enum class State { size_line, data, data_end, trailer, done, failed };
    void reject(int status, std::string slug, std::string detail);
    void end_size_line();

    GateLimits limits_;
    State state_ = State::size_line;
    std::string line_;          // the line being collected (size line or trailer)
    uint64_t remaining_ = 0;    // data bytes left in the current chunk
    uint64_t decoded_ = 0;      // data bytes decoded so far
    uint64_t trailers_ = 0;
    std::optional<GateRejection> rejection_;
};

// The request as cpp-httplib will read it: the request line, the kept fields,
// "Content-Length: <body size>" when the method may carry a body or the body
// is not empty, the blank line, then the body.
std::string canonical_request(const ParsedHead& head, std::string_view body);

// True for the loopback addresses (127.0.0.0/8, ::1, "localhost").
bool is_loopback_host(std::string_view host);

}  // namespace credence::server
