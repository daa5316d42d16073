#include "model/data/csv_reader.hpp"

#include <algorithm>
#include <array>
#include <cerrno>
#include <cstring>
#include <stdexcept>

#include "model/error.hpp"

namespace credence {

namespace {

// Longest raw text kept for a malformed record whose first line does not fit
// the buffer; enough to recognise the line in a rejects file.
constexpr size_t kLongLineKeepBytes = 4096;

// The line feeds in [from, to), counting no further than `most`.
uint64_t count_newlines(const char* from, const char* to, uint64_t most) {
    uint64_t seen = 0;
    while (from < to && seen < most) {
        const void* hit = std::memchr(from, '\n', static_cast<size_t>(to - from));
        if (!hit) break;
        ++seen;
        from = static_cast<const char*>(hit) + 1;
    }
    return seen;
}

// Offset of the first '\n' or '\r' in [from, to), or `to`.
size_t find_line_end(const char* data, size_t from, size_t to) {
    for (size_t i = from; i < to; ++i)
        if (data[i] == '\n' || data[i] == '\r') return i;
    return to;
}

}  // namespace

const char* describe(CsvProblem problem) {
    switch (problem) {
        case CsvProblem::none: return "no problem";
        case CsvProblem::unterminated_quote: return "unterminated quote (a quoted field never closes)";
        case CsvProblem::text_after_quote: return "text after a closing quote (quote the whole field and double inner quotes)";
        case CsvProblem::record_too_long: return "record too long (an unbalanced quote?)";
        case CsvProblem::too_many_lines:
            return "a quoted field runs over too many lines (a stray quote?); the line is skipped and reading "
                   "resumes on the next";
    }
    return "unknown problem";
}

CsvReader::CsvReader(std::FILE* file, std::function<void(std::string_view)> on_bytes,
                     size_t buffer_bytes, size_t max_record_bytes)
    : file_(file), on_bytes_(std::move(on_bytes)), max_record_bytes_(std::max<size_t>(max_record_bytes, 64)) {
    capacity_bytes_ = std::max(buffer_bytes, 2 * max_record_bytes_);
    buffer_.resize(std::min(capacity_bytes_, initial_buffer_bytes));
}

void CsvReader::set_max_record_lines(uint32_t lines) {
    if (lines == 0) throw std::invalid_argument("CsvReader: a record spans at least one line");
    max_record_lines_ = lines;
}

void CsvReader::set_delimiter(char delimiter) {
    if (delimiter == '"' || delimiter == '\r' || delimiter == '\n')
        throw std::invalid_argument("CsvReader: the delimiter cannot be a quote or a line break");
    delimiter_ = delimiter;
}

bool CsvReader::fill() {
    if (eof_) return false;
    if (begin_ > 0) {
        std::memmove(buffer_.data(), buffer_.data() + begin_, end_ - begin_);
        end_ -= begin_;
        begin_ = 0;
    }
    // Every byte in the buffer came from the file, so a buffer that has seen
    // as many bytes as it holds (a long file, or one record filling it) grows.
    if (buffer_.size() < capacity_bytes_ && bytes_read_ >= buffer_.size())
        buffer_.resize(std::min(capacity_bytes_, buffer_.size() * 4));
    const size_t want = buffer_.size() - end_;
    const size_t got = std::fread(buffer_.data() + end_, 1, want, file_);
    if (got < want) {
        if (std::ferror(file_)) throw FileError(std::string("read failed: ") + std::strerror(errno));
        eof_ = true;
    }
    if (got > 0) {
        if (on_bytes_) on_bytes_(std::string_view(buffer_.data() + end_, got));
        bytes_read_ += got;
        end_ += got;
    }
    if (!started_) {
        started_ = true;
        while (end_ < 3 && !eof_) fill();
        if (end_ >= 3 && std::memcmp(buffer_.data(), "\xEF\xBB\xBF", 3) == 0) {
            had_bom_ = true;
            begin_ = 3;
        }
    }
    return got > 0;
}

std::string_view CsvReader::peek(size_t max_bytes) {
    if (!started_) fill();
    while (end_ - begin_ < max_bytes && !eof_ && end_ < buffer_.size()) fill();
    return std::string_view(buffer_.data() + begin_, std::min(end_ - begin_, max_bytes));
}

bool CsvReader::next(CsvRecord& record) {
    if (!started_ || (begin_ == end_ && !eof_)) fill();
    for (;;) {
        if (begin_ == end_ && eof_) return false;
        switch (parse(record)) {
            case Parse::done: return true;
            case Parse::need_more: break;
            case Parse::malformed:
                take_first_line(record);
                return true;
        }
        if (record.problem == CsvProblem::unterminated_quote) {
            take_first_line(record);
            return true;
        }
        if (end_ - begin_ >= max_record_bytes_) {
            record.problem = CsvProblem::record_too_long;
            take_first_line(record);
            return true;
        }
        fill();
    }
}

// Scans one record from begin_. Field spans point into buffer_ (or into
// scratch_ for fields with doubled quotes) and become views only once the
// whole record is in, because a refill moves the buffer.
CsvReader::Parse CsvReader::parse(CsvRecord& record) {
    const char* b = buffer_.data();
    const size_t end = end_;
    const char d = delimiter_;
    size_t pos = begin_;
    uint64_t inner_newlines = 0;
    spans_.clear();
    scratch_.clear();
    record.line = line_;
    record.problem = CsvProblem::none;

    for (;;) {  // one field per turn
        if (pos < end && b[pos] == '"') {
            const Parse field = quoted_field(record, pos, inner_newlines);
            if (field != Parse::done) return field;
        } else {
            const size_t start = pos;
            while (pos < end) {
                const char c = b[pos];
                if (c == d || c == '\n' || c == '\r') break;
                ++pos;
            }
            spans_.push_back({false, start, pos - start});
        }

        if (pos == end && !eof_) return Parse::need_more;
        const size_t raw_end = pos;
        if (pos < end) {
            const char c = b[pos];
            if (c == d) {
                ++pos;
                continue;
            }
            if (c == '\r') {
                if (pos + 1 == end && !eof_) return Parse::need_more;
                pos += (pos + 1 < end && b[pos + 1] == '\n') ? 2 : 1;
            } else {
                ++pos;
            }
        }
        finish_record(record, raw_end, pos, inner_newlines);
        return Parse::done;
    }
}

CsvReader::Parse CsvReader::quoted_field(CsvRecord& record, size_t& pos, uint64_t& inner_newlines) {
    const char* b = buffer_.data();
    const size_t end = end_;
    const char d = delimiter_;
    const size_t content = pos + 1;
    size_t q = content;
    size_t counted_to = content;   // line feeds before this are in field_newlines
    uint64_t field_newlines = 0;
    bool doubled = false;
    for (;;) {
        const void* hit = q < end ? std::memchr(b + q, '"', end - q) : nullptr;
        const size_t at = hit ? static_cast<size_t>(static_cast<const char*>(hit) - b) : end;
        // Past the line limit with the field still open: a stray
        // quote, most likely; give up on this record now.
        field_newlines += count_newlines(b + counted_to, b + at, max_record_lines_);
        counted_to = at;
        if (inner_newlines + field_newlines >= max_record_lines_) {
            record.problem = CsvProblem::too_many_lines;
            return Parse::malformed;
        }
        if (hit == nullptr) {
            if (eof_) record.problem = CsvProblem::unterminated_quote;
            return Parse::need_more;
        }
        if (at + 1 == end && !eof_) return Parse::need_more;  // "" or " + delimiter? not known yet
        if (at + 1 < end && b[at + 1] == '"') {
            doubled = true;
            q = at + 2;
            continue;
        }
        inner_newlines += field_newlines;
        if (doubled) {
            const size_t offset = scratch_.size();
            for (size_t i = content; i < at; ++i) {
                scratch_.push_back(b[i]);
                if (b[i] == '"') ++i;  // keep one of each doubled pair
            }
            spans_.push_back({true, offset, scratch_.size() - offset});
        } else {
            spans_.push_back({false, content, at - content});
        }
        pos = at + 1;
        break;
    }
    if (pos < end && b[pos] != d && b[pos] != '\n' && b[pos] != '\r') {
        record.problem = CsvProblem::text_after_quote;
        while (pos < end && b[pos] != d && b[pos] != '\n' && b[pos] != '\r') ++pos;
    }
    return Parse::done;
}

void CsvReader::finish_record(CsvRecord& record, size_t raw_end, size_t next, uint64_t inner_newlines) {
    const char* b = buffer_.data();
    record.fields.clear();
    for (const auto& s : spans_)
        record.fields.emplace_back((s.in_scratch ? scratch_.data() : b) + s.offset, s.length);
    record.raw = std::string_view(b + begin_, raw_end - begin_);
    record.end_line = line_ + inner_newlines;
    begin_ = next;
    line_ += 1 + inner_newlines;
}

// For a malformed record: report its first physical line as raw and resume
// after that line, reading ahead (and discarding) if the line outgrew the buffer.
void CsvReader::take_first_line(CsvRecord& record) {
    record.fields.clear();
    record.end_line = record.line;
    const char* b = buffer_.data();
    size_t stop = find_line_end(b, begin_, end_);
    if (stop < end_ || eof_) {
        record.raw = std::string_view(b + begin_, stop - begin_);
        begin_ = stop;
        if (stop < end_) begin_ += (b[stop] == '\r' && stop + 1 < end_ && b[stop + 1] == '\n') ? 2 : 1;
    } else {
        long_line_.assign(b + begin_, std::min(end_ - begin_, kLongLineKeepBytes));
        begin_ = end_;
        while (fill()) {
            stop = find_line_end(buffer_.data(), begin_, end_);
            const size_t room = kLongLineKeepBytes - long_line_.size();
            long_line_.append(buffer_.data() + begin_, std::min(stop - begin_, room));
            if (stop < end_) {
                const char* nb = buffer_.data();
                begin_ = stop + ((nb[stop] == '\r' && stop + 1 < end_ && nb[stop + 1] == '\n') ? 2 : 1);
                break;
            }
            begin_ = end_;
        }
        record.raw = long_line_;
    }
    ++line_;
}

std::optional<char> detect_delimiter(std::string_view sample) {
    constexpr std::array<char, 4> candidates{',', '\t', ';', '|'};
    constexpr size_t max_lines = 10;
    std::vector<std::array<size_t, 4>> lines;
    std::array<size_t, 4> counts{};
    bool in_quotes = false, any = false;
    for (size_t i = 0; i < sample.size() && lines.size() < max_lines; ++i) {
        const char c = sample[i];
        if (c == '"') {
            in_quotes = !in_quotes;  // a doubled quote toggles twice: no net change
        } else if (!in_quotes && (c == '\n' || c == '\r')) {
            if (any) lines.push_back(counts);
            counts = {};
            any = false;
        } else {
            any = true;
            if (!in_quotes)
                for (size_t k = 0; k < candidates.size(); ++k)
                    if (c == candidates[k]) ++counts[k];
        }
    }
    // An unterminated last line may be cut short by the sample's end; use it
    // only when it is the only line.
    if (any && lines.empty()) lines.push_back(counts);
    if (lines.empty()) return std::nullopt;

    std::optional<size_t> best;
    for (size_t k = 0; k < candidates.size(); ++k) {
        const size_t first = lines[0][k];
        if (first == 0) continue;
        const bool consistent = std::all_of(lines.begin(), lines.end(), [&](const auto& l) { return l[k] == first; });
        if (consistent && (!best || lines[0][*best] < first)) best = k;
    }
    if (!best) {
        for (size_t k = 0; k < candidates.size(); ++k)
            if (lines[0][k] > 0 && (!best || lines[0][*best] < lines[0][k])) best = k;
    }
    if (!best) return std::nullopt;
    return candidates[*best];
}

}  // namespace credence
