#include "server/request_gate.hpp"

#include <algorithm>
#include <array>
#include <cctype>
#include <charconv>

namespace credence::server {

namespace {

GateRejection rejection(int status, std::string slug, std::string detail) {
    return GateRejection{status, std::move(slug), std::move(detail)};
}

std::string lower(std::string_view s) {
    std::string out(s);
    for (char& c : out) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
    return out;
}

bool same_name(std::string_view a, std::string_view b) {
    return a.size() == b.size() && lower(a) == lower(b);
}

// RFC 9110 section 5.6.2: tchar.
bool is_token_char(unsigned char c) {
    if (std::isalnum(c)) return true;
    constexpr std::string_view extra = "!#$%&'*+-.^_`|~";
    return extra.find(static_cast<char>(c)) != std::string_view::npos;
}

bool is_token(std::string_view s) {
    return !s.empty() && std::all_of(s.begin(), s.end(), [](char c) { return is_token_char(static_cast<unsigned char>(c)); });
}

std::string_view trim_ows(std::string_view s) {
    while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
    while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
    return s;
}

// The line in `text` starting at `pos`, without its LF and optional CR;
// `next` is set past the LF. Needs a LF at or after pos.
std::string_view line_at(std::string_view text, size_t pos, size_t& next) {
    const size_t lf = text.find('\n', pos);
    next = lf + 1;
    std::string_view line = text.substr(pos, lf - pos);
    if (!line.empty() && line.back() == '\r') line.remove_suffix(1);
    return line;
}

std::string limit_text(uint64_t bytes) { return std::to_string(bytes) + " bytes"; }

// Methods whose body cpp-httplib reads (detail::expect_content in 0.11.4).
bool method_takes_body(std::string_view method) {
    return method == "POST" || method == "PUT" || method == "PATCH" || method == "DELETE" || method == "PRI";
}

// Fields the gate owns: framing (replaced by one Content-Length), Range (JSON
// answers are whole), Expect (answered by the gate), and the names
// cpp-httplib uses for the peer's address (a client must not supply them).
bool dropped_field(std::string_view name) {
    static constexpr std::array<std::string_view, 9> names = {
        "content-length", "transfer-encoding", "range",      "if-range",   "expect",
        "remote_addr",    "remote_port",       "local_addr", "local_port"};
    const std::string l = lower(name);
    return std::find(names.begin(), names.end(), l) != names.end();
}

// Parses the Content-Length values (several fields, or a comma list in one,
// RFC 9110 section 8.6): all must be digits and equal.
std::variant<uint64_t, GateRejection> content_length(const std::vector<std::string_view>& values) {
    std::optional<uint64_t> length;
    for (std::string_view field : values) {
        size_t start = 0;
        while (start <= field.size()) {
            const size_t comma = std::min(field.find(',', start), field.size());
            const std::string_view item = trim_ows(field.substr(start, comma - start));
            uint64_t value = 0;
            const auto [ptr, ec] = std::from_chars(item.data(), item.data() + item.size(), value);
            if (item.empty() || ptr != item.data() + item.size() || ec == std::errc::invalid_argument ||
                !std::all_of(item.begin(), item.end(), [](char c) { return c >= '0' && c <= '9'; }))
                return rejection(400, "bad-content-length",
                                 "Content-Length must be a decimal number of bytes, got '" + std::string(item) + "'");
            if (ec == std::errc::result_out_of_range)
                return rejection(413, "body-too-large", "the declared Content-Length is beyond any limit");
            if (length && *length != value)
                return rejection(400, "conflicting-content-length",
                                 "the request has two different Content-Length values (" + std::to_string(*length) +
                                     " and " + std::to_string(value) + "); send exactly one");
            length = value;
            start = comma + 1;
        }
    }
    return *length;
}

// Reads the request line into `head`; a rejection when it is malformed.
std::optional<GateRejection> parse_request_line(std::string_view line, ParsedHead& head) {
    const size_t first = line.find(' ');
    const size_t second = first == std::string_view::npos ? first : line.find(' ', first + 1);
    if (second == std::string_view::npos || line.find(' ', second + 1) != std::string_view::npos)
        return rejection(400, "bad-request-line",
                         "the request line must be 'METHOD TARGET HTTP/1.1' with single spaces");
    head.method = std::string(line.substr(0, first));
    head.target = std::string(line.substr(first + 1, second - first - 1));
    head.version = std::string(line.substr(second + 1));
    if (!is_token(head.method)) return rejection(400, "bad-request-line", "the request method is not a valid token");
    if (head.target.empty() || std::any_of(head.target.begin(), head.target.end(), [](char c) {
            const auto u = static_cast<unsigned char>(c);
            return u <= 0x20 || u == 0x7f;
        }))
        return rejection(400, "bad-request-line", "the request target is empty or holds control characters or spaces");
    if (head.version != "HTTP/1.1" && head.version != "HTTP/1.0") {
        const bool looks_http = head.version.size() == 8 && head.version.rfind("HTTP/", 0) == 0;
        return looks_http ? rejection(505, "http-version", "only HTTP/1.1 and HTTP/1.0 are served")
                          : rejection(400, "bad-request-line", "the request line does not end in HTTP/1.1");
    }
    return std::nullopt;
}

// Reads one field line into `head` (kept fields) and the framing lists.
std::optional<GateRejection> parse_field(std::string_view line, ParsedHead& head,
                                         std::vector<std::string_view>& lengths,
                                         std::vector<std::string_view>& codings) {
    if (line.front() == ' ' || line.front() == '\t')
        return rejection(400, "bad-header", "obsolete line folding (a header line starting with a space) is not accepted");
    const size_t colon = line.find(':');
    if (colon == std::string_view::npos || !is_token(line.substr(0, colon)))
        return rejection(400, "bad-header", "a header line must be 'Name: value' with no space before the colon");
    const std::string_view name = line.substr(0, colon);
    const std::string_view value = trim_ows(line.substr(colon + 1));
    if (std::any_of(value.begin(), value.end(), [](char c) {
            const auto u = static_cast<unsigned char>(c);
            return (u < 0x20 && u != '\t') || u == 0x7f;
        }))
        return rejection(400, "bad-header", "header " + std::string(name) + " holds a control character");
    if (same_name(name, "Content-Length")) lengths.push_back(value);
    else if (same_name(name, "Transfer-Encoding")) codings.push_back(value);
    else if (same_name(name, "Expect")) {
        if (lower(value) != "100-continue")
            return rejection(417, "expectation-failed", "only 'Expect: 100-continue' is supported");
        head.expects_continue = true;
    } else if (same_name(name, "Content-Type") && lower(value).rfind("application/x-www-form-urlencoded", 0) == 0)
        head.form_encoded = true;
    if (!dropped_field(name)) head.fields.emplace_back(std::string(name), std::string(value));
    return std::nullopt;
}

// Decides the body framing from the Content-Length and Transfer-Encoding values.
std::optional<GateRejection> decide_framing(ParsedHead& head, const std::vector<std::string_view>& lengths,
                                            const std::vector<std::string_view>& codings) {
    if (!codings.empty()) {
        if (!lengths.empty())
            return rejection(400, "conflicting-framing",
                             "the request has both Transfer-Encoding and Content-Length; send one of them");
        if (head.version == "HTTP/1.0")
            return rejection(400, "bad-framing", "Transfer-Encoding is not defined for HTTP/1.0");
        std::vector<std::string> items;
        for (std::string_view field : codings) {
            size_t start = 0;
            while (start <= field.size()) {
                const size_t comma = std::min(field.find(',', start), field.size());
                const std::string item = lower(trim_ows(field.substr(start, comma - start)));
                if (!item.empty()) items.push_back(item);
                start = comma + 1;
            }
        }
        if (items.size() != 1 || items[0] != "chunked")
            return rejection(501, "unsupported-transfer-coding",
                             "only 'Transfer-Encoding: chunked' is supported; send the body with Content-Length");
        head.framing.kind = BodyFraming::Kind::chunked;
        return std::nullopt;
    }
    if (lengths.empty()) return std::nullopt;  // no body (RFC 9112 section 6.3, last rule)
    auto length = content_length(lengths);
    if (auto* refused = std::get_if<GateRejection>(&length)) return *refused;
    head.framing = {BodyFraming::Kind::length, std::get<uint64_t>(length)};
    return std::nullopt;
}

}  // namespace

GateRejection form_body_too_large(const GateLimits& limits) {
    return rejection(413, "form-body-too-large",
                     "a form-encoded body (Content-Type: application/x-www-form-urlencoded) may be at most " +
                         limit_text(limits.form_body_limit_bytes) +
                         "; send JSON with Content-Type: application/json (limit " +
                         limit_text(limits.body_limit_bytes) + ")");
}

HeadScan scan_head(std::string_view buffered, const GateLimits& limits) {
    HeadScan scan;
    size_t pos = 0;
    bool seen_request_line = false;
    uint64_t fields = 0;
    while (pos < buffered.size()) {
        const size_t lf = buffered.find('\n', pos);
        const size_t available = (lf == std::string_view::npos ? buffered.size() : lf) - pos;
        // A line may end in CR LF: allow one byte beyond the limit for the CR.
        if (available > limits.header_line_limit_bytes + 1) {
            scan.rejection = seen_request_line
                                 ? rejection(431, "header-too-large",
                                             "a header line is longer than the limit of " +
                                                 limit_text(limits.header_line_limit_bytes))
                                 : rejection(414, "uri-too-long",
                                             "the request line is longer than the limit of " +
                                                 limit_text(limits.header_line_limit_bytes));
            return scan;
        }
        if (lf == std::string_view::npos) return scan;  // the line is still arriving
        size_t next = 0;
        const std::string_view line = line_at(buffered, pos, next);
        pos = next;
        if (line.empty()) {
            if (seen_request_line) {
                scan.complete = true;
                scan.head_bytes = pos;
                return scan;
            }
            // Empty lines before the request line are skipped; they count
            // against the field limit so an endless stream of them ends.
        } else if (!seen_request_line) {
            seen_request_line = true;
            continue;
        }
        if (++fields > limits.header_count_limit) {
            scan.rejection = rejection(431, "too-many-headers",
                                       "the request has more than " + std::to_string(limits.header_count_limit) +
                                           " header lines");
            return scan;
        }
    }
    return scan;
}

RequestLine peek_request_line(std::string_view buffered, const GateLimits& limits) {
    size_t pos = 0;
    std::string_view line;
    do {
        if (buffered.find('\n', pos) == std::string_view::npos) return {};
        size_t next = 0;
        line = line_at(buffered, pos, next);
        pos = next;
    } while (line.empty());
    // scan_head's count: the line end excluded, one byte of slack for a CR.
    if (line.size() > limits.header_line_limit_bytes + 1) return {};
    ParsedHead parsed;
    if (parse_request_line(line, parsed)) return {};
    return {std::move(parsed.method), std::move(parsed.target)};
}

std::variant<ParsedHead, GateRejection> parse_head(std::string_view head, const GateLimits& limits) {
    ParsedHead parsed;
    size_t pos = 0;
    std::string_view line;
    // Skip empty lines before the request line.
    do {
        if (head.find('\n', pos) == std::string_view::npos)
            return rejection(400, "bad-request-line", "the request has no request line");
        size_t next = 0;
        line = line_at(head, pos, next);
        pos = next;
    } while (line.empty());
    if (auto refused = parse_request_line(line, parsed)) return *refused;

    std::vector<std::string_view> lengths, codings;
    while (head.find('\n', pos) != std::string_view::npos) {
        size_t next = 0;
        line = line_at(head, pos, next);
        pos = next;
        if (line.empty()) break;
        if (auto refused = parse_field(line, parsed, lengths, codings)) return *refused;
    }
    if (auto refused = decide_framing(parsed, lengths, codings)) return *refused;

    if (parsed.framing.kind == BodyFraming::Kind::length) {
        if (parsed.form_encoded && parsed.framing.length > limits.form_body_limit_bytes)
            return form_body_too_large(limits);
        if (parsed.framing.length > limits.body_limit_bytes)
            return rejection(413, "body-too-large",
                             "the request body exceeds the server's limit of " + limit_text(limits.body_limit_bytes) +
                                 "; send a smaller batch");
    }
    return parsed;
}

void ChunkDecoder::reject(int status, std::string slug, std::string detail) {
    rejection_ = server::rejection(status, std::move(slug), std::move(detail));
    state_ = State::failed;
}

void ChunkDecoder::end_size_line() {
    // chunk-size [ chunk-ext ]: hex digits, then optional BWS ";" extensions (ignored).
    std::string_view line = line_;
    if (!line.empty() && line.back() == '\r') line.remove_suffix(1);
    size_t digits = 0;
    uint64_t size = 0;
    while (digits < line.size() && std::isxdigit(static_cast<unsigned char>(line[digits]))) {
        if (size > (UINT64_MAX >> 4)) return reject(413, "body-too-large", "a chunk size is beyond any limit");
        const char c = line[digits];
        size = size * 16 + static_cast<uint64_t>(std::isdigit(static_cast<unsigned char>(c)) ? c - '0'
                                                                                             : std::tolower(c) - 'a' + 10);
        ++digits;
    }
    const std::string_view rest = trim_ows(line.substr(digits));
    if (digits == 0 || (!rest.empty() && rest.front() != ';'))
        return reject(400, "bad-chunk", "a chunk-size line is not a hexadecimal size");
    line_.clear();
    if (size == 0) {
        state_ = State::trailer;
        return;
    }
    if (size > limits_.body_limit_bytes - std::min(limits_.body_limit_bytes, decoded_))
        return reject(413, "body-too-large",
                      "the chunked request body exceeds the server's limit of " + limit_text(limits_.body_limit_bytes) +
                          "; send a smaller batch");
    remaining_ = size;
    state_ = State::data;
}

size_t ChunkDecoder::feed(std::string_view input, std::string& body) {
    size_t used = 0;
    while (used < input.size() && state_ != State::done && state_ != State::failed) {
        if (state_ == State::data) {
            const size_t take = static_cast<size_t>(std::min<uint64_t>(remaining_, input.size() - used));
            body.append(input.data() + used, take);
            decoded_ += take;
            used += take;
            remaining_ -= take;
            if (remaining_ == 0) state_ = State::data_end;
            continue;
        }
        // The other states collect a line up to LF.
        const char c = input[used++];
        if (c != '\n') {
            line_.push_back(c);
            if (line_.size() > limits_.header_line_limit_bytes + 1)
                reject(431, "header-too-large",
                       "a chunk-size or trailer line is longer than the limit of " +
                           limit_text(limits_.header_line_limit_bytes));
            continue;
        }
        if (state_ == State::size_line) {
            end_size_line();
        } else if (state_ == State::data_end) {
            if (!(line_.empty() || line_ == "\r")) reject(400, "bad-chunk", "chunk data is not followed by CRLF");
            else state_ = State::size_line;
            line_.clear();
        } else {  // trailer
            const bool blank = line_.empty() || line_ == "\r";
            line_.clear();
            if (blank) state_ = State::done;
            else if (++trailers_ > limits_.header_count_limit)
                reject(431, "too-many-headers", "the chunked body has more than " +
                                                    std::to_string(limits_.header_count_limit) + " trailer lines");
        }
    }
    return used;
}

std::string canonical_request(const ParsedHead& head, std::string_view body) {
    std::string out;
    const bool with_body = method_takes_body(head.method);
    size_t size = head.method.size() + head.target.size() + head.version.size() + 64 + (with_body ? body.size() : 0);
    for (const auto& [name, value] : head.fields) size += name.size() + value.size() + 4;
    out.reserve(size);
    out.append(head.method).append(" ").append(head.target).append(" ").append(head.version).append("\r\n");
    for (const auto& [name, value] : head.fields) out.append(name).append(": ").append(value).append("\r\n");
    if (with_body) out.append("Content-Length: ").append(std::to_string(body.size())).append("\r\n");
    out.append("\r\n");
    if (with_body) out.append(body);
    return out;
}

bool is_loopback_host(std::string_view host) {
    if (host == "localhost" || host == "::1" || host == "[::1]") return true;
    return host.rfind("127.", 0) == 0;
}

}  // namespace credence::server
