// Streaming RFC 4180 record reader for CSV/TSV exports: quoted fields,
// doubled quotes, delimiters and line breaks inside quotes, LF / CRLF / CR
// line ends, a leading UTF-8 byte order mark. It reads through one large
// buffer and never holds more than a buffer's worth of the input, so files of
// any size stream through in constant memory.
//
// A malformed record is reported, not repaired: the record comes back with a
// `problem` set, its first physical line as `raw`, and no fields, and reading
// resumes at the next physical line, so a stray quote that never closes, or
// not within max_record_lines lines or max_record_bytes bytes, costs one line
// rather than the rest of the file. A stray quote that a later quote closes
// within max_record_lines cannot be told from a quoted line break: those few
// lines become one record (the ingest rejects an id holding a line break).
#pragma once
#include <cstddef>
#include <cstdint>
#include <cstdio>
#include <functional>
#include <optional>
#include <string>
#include <string_view>
#include <vector>

namespace credence {

enum class CsvProblem {
    none,
    unterminated_quote,   // input ended inside a quoted field
    text_after_quote,     // e.g. "abc"x, : characters between a closing quote and the delimiter
    record_too_long,      // longer than max_record_bytes (usually an unbalanced quote)
    too_many_lines,       // a quoted field runs over more than max_record_lines physical lines
};

// A short human phrase for a problem ("unterminated quote", ...).
const char* describe(CsvProblem problem);

struct CsvRecord {
    // Field contents with quotes removed and doubled quotes collapsed. Views
    // into the reader's buffer: valid until the next call to next().
    std::vector<std::string_view> fields;
    // The record's bytes as they stand in the file, without the line end
    // (several physical lines when a quoted field spans lines).
    std::string_view raw;
    uint64_t line = 0;                // 1-based physical line where the record starts
    uint64_t end_line = 0;            // physical line where it ends (== line unless a quoted field spans lines)
    CsvProblem problem = CsvProblem::none;
};

class CsvReader {
public:
    static constexpr size_t default_buffer_bytes = size_t{4} << 20;
    static constexpr size_t default_max_record_bytes = size_t{1} << 20;
    static constexpr uint32_t default_max_record_lines = 8;
    static constexpr size_t initial_buffer_bytes = size_t{64} << 10;

    // Needs: `file` open for reading; it is not owned and not closed.
    // `on_bytes` (optional) sees every byte read from the file exactly once,
    // in order, BOM included, a buffer-full at a time: the hook for hashing
    // and progress. buffer_bytes is raised to at least 2 * max_record_bytes;
    // the buffer starts at initial_buffer_bytes and grows fourfold up to it
    // while the input keeps coming, so a small file never pays for a large one.
    explicit CsvReader(std::FILE* file, std::function<void(std::string_view)> on_bytes = {},
                       size_t buffer_bytes = default_buffer_bytes,
                       size_t max_record_bytes = default_max_record_bytes);

    // Returns the start of the input (after any BOM) without consuming it, up
    // to max_bytes or whatever the first buffer fill holds. For delimiter
    // detection; call before the first next(). Throws FileError (message
    // starting "read failed") if the file cannot be read.
    std::string_view peek(size_t max_bytes = 64 * 1024);

    // The field separator; ',' until set. Any byte except '"', '\r', '\n';
    // throws std::invalid_argument for those (ingest checks a user's
    // delimiter first, so that is a bug in the caller).
    void set_delimiter(char delimiter);
    char delimiter() const { return delimiter_; }

    // Most physical lines one record may span (a quoted field with line
    // breaks); a record that would span more is malformed (too_many_lines).
    // Throws std::invalid_argument for 0.
    void set_max_record_lines(uint32_t lines);

    // Reads the next record into `record`; false at end of input. A blank
    // line comes back as a record with one empty field and an empty raw.
    // Throws FileError (message starting "read failed") if the file cannot
    // be read.
    bool next(CsvRecord& record);

    uint64_t bytes_read() const { return bytes_read_; }
    bool had_bom() const { return had_bom_; }

private:
    enum class Parse { done, need_more, malformed };
    struct FieldSpan {
        bool in_scratch;
        size_t offset;
        size_t length;
    };
    bool fill();  // reads more input behind end_; false at end of file
    Parse parse(CsvRecord& record);
    // The quoted field whose opening quote is at pos, into spans_; moves pos
    // past the closing quote and past any text after it (noted as
    // text_after_quote), and adds the field's line feeds to inner_newlines.
    // Returns done when the field is complete; need_more when the buffer
    // ends inside it (noting unterminated_quote at the end of the input);
    // malformed when the record passes max_record_lines_ (too_many_lines).
    Parse quoted_field(CsvRecord& record, size_t& pos, uint64_t& inner_newlines);
    // Hands out the record whose text ends at raw_end (before its line end):
    // its fields as views into buffer_ and scratch_, its raw text and last
    // line; the next record starts at `next`.
    void finish_record(CsvRecord& record, size_t raw_end, size_t next, uint64_t inner_newlines);
    void take_first_line(CsvRecord& record);

    std::FILE* file_;
    std::function<void(std::string_view)> on_bytes_;
    std::vector<char> buffer_;  // grows toward capacity_bytes_ (see fill)
    size_t capacity_bytes_;
    size_t begin_ = 0;          // start of the unconsumed input in buffer_
    size_t end_ = 0;            // end of valid bytes in buffer_
    bool eof_ = false;
    bool started_ = false;      // first fill done (BOM handled)
    bool had_bom_ = false;
    char delimiter_ = ',';
    size_t max_record_bytes_;
    uint32_t max_record_lines_ = default_max_record_lines;
    uint64_t line_ = 1;
    uint64_t bytes_read_ = 0;
    std::vector<FieldSpan> spans_;
    std::string scratch_;       // unescaped text of fields with doubled quotes
    std::string long_line_;     // raw of a malformed record whose first line outgrew the buffer
};

// Picks the separator among ',', '\t', ';', '|' from the first lines of
// `sample`: the candidate that appears the same nonzero number of times on
// every sampled line wins, the most frequent on the first line otherwise
// (ties in that order). Quoted text is ignored. nullopt when none appears.
std::optional<char> detect_delimiter(std::string_view sample);

}  // namespace credence
