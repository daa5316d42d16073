// Tests for server/request_gate: the head scanner, head parser, chunk decoder
// and the canonical request handed to cpp-httplib, on byte strings (no
// sockets). The HTTP rules cited are RFC 9112 (message syntax) and RFC 9110.
#include <catch2/catch.hpp>

#include <string>
#include <variant>

#include "server/request_gate.hpp"

using namespace credence::server;

namespace {

const GateLimits kLimits{.header_line_limit_bytes = 100,
                         .header_count_limit = 5,
                         .body_limit_bytes = 1000,
                         .form_body_limit_bytes = 50};

ParsedHead parsed(const std::string& head) {
    auto result = parse_head(head, kLimits);
    if (auto* refused = std::get_if<GateRejection>(&result)) FAIL("refused: " << refused->detail);
    return std::get<ParsedHead>(result);
}

GateRejection refused(const std::string& head) {
    auto result = parse_head(head, kLimits);
    REQUIRE(std::holds_alternative<GateRejection>(result));
    return std::get<GateRejection>(result);
}

}  // namespace

TEST_CASE("a head is complete at its blank line and not before") {
    const std::string head = "GET /v1/health HTTP/1.1\r\nHost: x\r\n\r\n";
    for (size_t cut = 0; cut < head.size(); ++cut) {
        const HeadScan scan = scan_head(head.substr(0, cut), kLimits);
        CHECK_FALSE(scan.complete);
        CHECK_FALSE(scan.rejection);
    }
    const HeadScan scan = scan_head(head + "tail", kLimits);
    CHECK(scan.complete);
    CHECK(scan.head_bytes == head.size());
}

TEST_CASE("a header line longer than the limit is refused before its line end arrives") {
    const std::string start = "GET / HTTP/1.1\r\nX-Long: ";
    // 300 bytes and no LF: a client that never ends the line is cut off here.
    const HeadScan scan = scan_head(start + std::string(300, 'a'), kLimits);
    REQUIRE(scan.rejection);
    CHECK(scan.rejection->status == 431);
    CHECK(scan.rejection->detail.find("100 bytes") != std::string::npos);
    // A request line too long is 414 (RFC 9112 section 3).
    const HeadScan uri = scan_head("GET /" + std::string(300, 'a'), kLimits);
    REQUIRE(uri.rejection);
    CHECK(uri.rejection->status == 414);
}

TEST_CASE("more header lines than the limit are refused with 431") {
    std::string head = "GET / HTTP/1.1\r\n";
    for (int k = 0; k < 6; ++k) head += "X-" + std::to_string(k) + ": v\r\n";
    const HeadScan scan = scan_head(head, kLimits);
    REQUIRE(scan.rejection);
    CHECK(scan.rejection->status == 431);
    // Endless empty lines before a request line end too.
    const HeadScan blanks = scan_head(std::string(50, '\n'), kLimits);
    REQUIRE(blanks.rejection);
    CHECK(blanks.rejection->status == 431);
}

TEST_CASE("a POST without Content-Length or Transfer-Encoding has an empty body") {
    const ParsedHead head = parsed("POST /v1/admin/reload HTTP/1.1\r\nHost: x\r\n\r\n");
    CHECK(head.framing.kind == BodyFraming::Kind::none);
    // httplib reads a body-less POST until the peer closes; the canonical
    // request says Content-Length: 0 instead (RFC 9112 section 6.3).
    CHECK(canonical_request(head, "") ==
          "POST /v1/admin/reload HTTP/1.1\r\nHost: x\r\nContent-Length: 0\r\n\r\n");
}

TEST_CASE("two different Content-Length values are refused; repeated equal ones are one") {
    const auto conflict = refused("POST / HTTP/1.1\r\nContent-Length: 5\r\nContent-Length: 6\r\n\r\n");
    CHECK(conflict.status == 400);
    CHECK(conflict.detail.find("two different Content-Length") != std::string::npos);
    CHECK(refused("POST / HTTP/1.1\r\nContent-Length: 5, 7\r\n\r\n").status == 400);
    CHECK(refused("POST / HTTP/1.1\r\nContent-Length: -1\r\n\r\n").status == 400);
    CHECK(refused("POST / HTTP/1.1\r\nContent-Length: 0x10\r\n\r\n").status == 400);
    const ParsedHead same = parsed("POST / HTTP/1.1\r\nContent-Length: 5\r\ncontent-length: 5\r\n\r\n");
    CHECK(same.framing.kind == BodyFraming::Kind::length);
    CHECK(same.framing.length == 5);
}

TEST_CASE("Transfer-Encoding with Content-Length, or any coding but chunked, is refused") {
    CHECK(refused("POST / HTTP/1.1\r\nTransfer-Encoding: chunked\r\nContent-Length: 3\r\n\r\n").status == 400);
    CHECK(refused("POST / HTTP/1.1\r\nTransfer-Encoding: gzip, chunked\r\n\r\n").status == 501);
    CHECK(refused("POST / HTTP/1.0\r\nTransfer-Encoding: chunked\r\n\r\n").status == 400);
    CHECK(parsed("POST / HTTP/1.1\r\nTransfer-Encoding: Chunked\r\n\r\n").framing.kind == BodyFraming::Kind::chunked);
}

TEST_CASE("a declared body over the limit is refused before it is read") {
    const auto big = refused("POST / HTTP/1.1\r\nContent-Length: 1001\r\n\r\n");
    CHECK(big.status == 413);
    CHECK(big.detail.find("1000 bytes") != std::string::npos);
    CHECK(refused("POST / HTTP/1.1\r\nContent-Length: 99999999999999999999999\r\n\r\n").status == 413);
    const auto form = refused(
        "POST / HTTP/1.1\r\nContent-Type: application/x-www-form-urlencoded\r\nContent-Length: 51\r\n\r\n");
    CHECK(form.status == 413);
    // The message names the form limit, not the general one, and what to do.
    CHECK(form.detail.find("at most 50 bytes") != std::string::npos);
    CHECK(form.detail.find("application/json") != std::string::npos);
}

TEST_CASE("Range fields are dropped and client-sent peer address fields never reach the library") {
    const ParsedHead head = parsed(
        "GET /v1/model HTTP/1.1\r\nRange: bytes=0-10\r\nIf-Range: x\r\nREMOTE_ADDR: 10.0.0.1\r\nAccept: */*\r\n\r\n");
    const std::string request = canonical_request(head, "");
    CHECK(request == "GET /v1/model HTTP/1.1\r\nAccept: */*\r\n\r\n");
}

TEST_CASE("malformed request lines and fields are refused with 400, other versions with 505") {
    CHECK(refused("GET  / HTTP/1.1\r\n\r\n").status == 400);
    CHECK(refused("GET / HTTP/1.1 extra\r\n\r\n").status == 400);
    CHECK(refused("GET / HTTP/2.0\r\n\r\n").status == 505);
    CHECK(refused("GET / FTP\r\n\r\n").status == 400);
    CHECK(refused("GET / HTTP/1.1\r\nHost : x\r\n\r\n").status == 400);
    CHECK(refused("GET / HTTP/1.1\r\nX: a\r\n folded\r\n\r\n").status == 400);
    static constexpr char nul_in_header[] = "GET / HTTP/1.1\r\nX: a\0b\r\n\r\n";
    CHECK(refused(std::string(nul_in_header, sizeof nul_in_header - 1)).status == 400);
    CHECK(refused("GET / HTTP/1.1\r\nExpect: something\r\n\r\n").status == 417);
    CHECK(parsed("\r\n\r\nGET / HTTP/1.1\r\nExpect: 100-continue\r\n\r\n").expects_continue);
}

TEST_CASE("a chunked body is decoded across any split and ends at its last chunk") {
    const std::string wire = "4;ext=1\r\nWiki\r\n5\r\npedia\r\nE\r\n in\r\n\r\nchunks.\r\n0\r\nX-Trailer: t\r\n\r\nNEXT";
    for (size_t step : {size_t{1}, size_t{3}, size_t{7}, wire.size()}) {
        ChunkDecoder decoder(kLimits);
        std::string body;
        size_t at = 0;
        size_t used = 0;
        while (!decoder.done() && at < wire.size()) {
            const std::string piece = wire.substr(at, step);
            used = decoder.feed(piece, body);
            at += used;
            if (used < piece.size()) break;
        }
        INFO(step);
        REQUIRE(decoder.done());
        CHECK_FALSE(decoder.rejection());
        CHECK(body == "Wikipedia in\r\n\r\nchunks.");
        CHECK(wire.substr(at) == "NEXT");
    }
}

TEST_CASE("a chunked body over the limit is refused at the chunk size, before its data") {
    ChunkDecoder decoder(kLimits);
    std::string body;
    decoder.feed("3e8\r\n", body);  // 1000 bytes: exactly the limit
    REQUIRE_FALSE(decoder.rejection());
    decoder.feed(std::string(1000, 'x') + "\r\n1\r\n", body);
    REQUIRE(decoder.rejection());
    CHECK(decoder.rejection()->status == 413);
    CHECK(body.size() == 1000);
    // Sizes that overflow 64 bits, and sizes that are not hex.
    ChunkDecoder overflow(kLimits);
    overflow.feed("fffffffffffffffffffff\r\n", body);
    REQUIRE(overflow.rejection());
    CHECK(overflow.rejection()->status == 413);
    ChunkDecoder garbage(kLimits);
    garbage.feed("zz\r\n", body);
    REQUIRE(garbage.rejection());
    CHECK(garbage.rejection()->status == 400);
    ChunkDecoder missing_crlf(kLimits);
    missing_crlf.feed("2\r\nabX\r\n", body);
    REQUIRE(missing_crlf.rejection());
    CHECK(missing_crlf.rejection()->status == 400);
    ChunkDecoder long_line(kLimits);
    long_line.feed("1;" + std::string(200, 'e'), body);
    REQUIRE(long_line.rejection());
    CHECK(long_line.rejection()->status == 431);
}

TEST_CASE("the request line is read for a refused request only when it arrived whole and well formed") {
    const GateLimits limits{.header_line_limit_bytes = 64};
    const RequestLine whole = peek_request_line("\r\nPOST /v1/predictions?x=1 HTTP/1.1\r\nContent-Le", limits);
    CHECK(whole.method == "POST");
    CHECK(whole.target == "/v1/predictions?x=1");
    for (const std::string& partial : {std::string("GET /v1/ite"), std::string("GET /a  HTTP/1.1\r\n"),
                                      std::string("GET /a HTTP/2.0\r\n"), std::string(""),
                                      "GET /" + std::string(100, 'a') + " HTTP/1.1\r\n"}) {
        INFO(partial);
        const RequestLine none = peek_request_line(partial, limits);
        CHECK(none.method.empty());
        CHECK(none.target.empty());
    }
}

TEST_CASE("loopback hosts are recognised") {
    CHECK(is_loopback_host("127.0.0.1"));
    CHECK(is_loopback_host("127.1.2.3"));
    CHECK(is_loopback_host("localhost"));
    CHECK(is_loopback_host("::1"));
    CHECK_FALSE(is_loopback_host("0.0.0.0"));
    CHECK_FALSE(is_loopback_host("10.0.0.5"));
    CHECK_FALSE(is_loopback_host("::"));
}
