#include "model/data/csv_source.hpp"

#include <cerrno>
#include <algorithm>
#include <cstring>
#include <filesystem>

#include <fmt/format.h>

#include "model/error.hpp"

namespace credence {

namespace {

bool blank_text(std::string_view s) { return s.find_first_not_of(" \t") == std::string_view::npos; }

// Refuses text that is not UTF-8 (or ASCII) by name: UTF-16 and UTF-32 by
// their byte-order mark or their pattern of NUL bytes, anything else with NUL
// bytes as binary. Unicode Standard section 23.8 gives the byte-order marks.
void check_encoding(std::string_view sample, const std::string& name) {
    auto starts = [&](std::string_view mark) { return sample.substr(0, mark.size()) == mark; };
    std::string encoding;
    if (starts(std::string_view("\xFF\xFE\0\0", 4))) encoding = "UTF-32 (little-endian)";
    else if (starts(std::string_view("\0\0\xFE\xFF", 4))) encoding = "UTF-32 (big-endian)";
    else if (starts("\xFF\xFE")) encoding = "UTF-16 (little-endian)";
    else if (starts("\xFE\xFF")) encoding = "UTF-16 (big-endian)";
    else {
        // Without a mark: ASCII text in UTF-16 has every other byte zero. A
        // few stray NUL bytes are left to the rows they are in (rejected).
        size_t even = 0, odd = 0;
        const size_t n = std::min<size_t>(sample.size(), 4096);
        for (size_t i = 0; i < n; ++i)
            if (sample[i] == '\0') ++(i % 2 ? odd : even);
        if (odd * 3 > n) encoding = "UTF-16 (little-endian)";
        else if (even * 3 > n) encoding = "UTF-16 (big-endian)";
        else if ((odd + even) * 10 > n)
            throw DataError(fmt::format("{} holds NUL bytes: it is not a text export; check the path", name));
    }
    if (!encoding.empty())
        throw DataError(fmt::format("{} is {} text; save it as UTF-8 (for example: iconv -f UTF-16 -t UTF-8 in > out)",
                                    name, encoding));
}

}  // namespace

CsvSource::CsvSource(const std::string& path, std::optional<char> delimiter,
                     std::function<void(uint64_t, uint64_t)> progress)
    : name_(path == "-" ? std::string("standard input") : path),
      hash_(XXH3_createState(), &XXH3_freeState),
      progress_(std::move(progress)) {
    if (!hash_) throw std::bad_alloc();
    XXH3_64bits_reset(hash_.get());
    const bool from_stdin = path == "-";
    std::error_code ec;
    if (!from_stdin && std::filesystem::is_directory(path, ec))
        throw FileError(fmt::format("{} is a directory; pass the ratings file inside it", path));
    file_.reset(from_stdin ? stdin : std::fopen(path.c_str(), "rb"));
    if (!file_) throw FileError(fmt::format("cannot open {}: {}; check the path", path, std::strerror(errno)));
    if (!from_stdin) {
        const auto size = std::filesystem::file_size(path, ec);
        if (!ec) bytes_total_ = size;
    }
    reader_ = std::make_unique<CsvReader>(file_.get(), [this](std::string_view chunk) {
        XXH3_64bits_update(hash_.get(), chunk.data(), chunk.size());
        bytes_done_ += chunk.size();
        if (progress_) progress_(bytes_done_, bytes_total_);
    });
    try {
        check_encoding(reader_->peek(), name_);
        if (delimiter) {
            reader_->set_delimiter(*delimiter);
            return;
        }
        const auto sample = reader_->peek();
        const auto detected = detect_delimiter(sample);
        if (!detected && sample.find_first_not_of(" \t\r\n") == std::string_view::npos)
            throw DataError(fmt::format("{} has no rows; check the path", name_));
        if (!detected)
            throw DataError(fmt::format("{}, line 1: cannot tell the delimiter: the first line has no ',', tab, ';' "
                                        "or '|'; pass --delimiter",
                                        name_));
        reader_->set_delimiter(*detected);
    } catch (const FileError& e) {
        throw FileError(fmt::format("{}: {}; check the file", name_, e.what()));
    }
}

void CsvSource::close_unless_stdin(std::FILE* file) {
    if (file && file != stdin) std::fclose(file);
}

CsvSource::~CsvSource() {
    reader_.reset();  // before file_, which it reads
}

bool CsvSource::next(SourceRow& row) {
    try {
        if (!reader_->next(record_)) return false;
    } catch (const FileError& e) {
        // The reader does not know the file's name.
        throw FileError(fmt::format("{}: {}; check the file", name_, e.what()));
    }
    row.fields.assign(record_.fields.begin(), record_.fields.end());
    row.is_null.clear();
    row.raw = record_.raw;
    row.position = record_.line;
    row.end_position = record_.end_line;
    row.problem = record_.problem == CsvProblem::none ? std::string_view() : std::string_view(describe(record_.problem));
    row.blank = record_.problem == CsvProblem::none && blank_text(record_.raw);
    return true;
}

SourceFacts CsvSource::facts() const {
    char hex[17];
    std::snprintf(hex, sizeof hex, "%016llx", static_cast<unsigned long long>(XXH3_64bits_digest(hash_.get())));
    return {hex, reader_->delimiter()};
}

}  // namespace credence
