// A CSV/TSV export (or standard input) as a row source for ingest
// (model/data/row_source.hpp): the file is read by model/data/csv_reader.hpp
// through one large buffer, hashed as it streams (the data fingerprint), and
// its delimiter is the one given or the one detected from the first lines.
#pragma once
#include <cstdint>
#include <cstdio>
#include <functional>
#include <memory>
#include <optional>
#include <string>

#include <xxhash.h>

#include "model/data/csv_reader.hpp"
#include "model/data/row_source.hpp"

namespace credence {

class CsvSource final : public RowSource {
public:
    // Opens `path` ("-": standard input, not closed), reads its first buffer
    // and settles the delimiter (`delimiter`, else detected). `progress`
    // (may be empty) gets (bytes read, file size or 0) after each buffer.
    // Throws FileError when the path is a directory or cannot be opened or
    // read; DataError when the file has no rows or no line shows a delimiter
    // (the message says to pass --delimiter). Needs a delimiter other than a
    // quote or a line break (std::invalid_argument: ingest checks first).
    CsvSource(const std::string& path, std::optional<char> delimiter,
              std::function<void(uint64_t bytes_done, uint64_t bytes_total)> progress);
    ~CsvSource() override;

    const std::string& name() const override { return name_; }
    const char* position_unit() const override { return "line"; }
    std::optional<std::vector<std::string>> column_names() override { return std::nullopt; }
    bool next(SourceRow& row) override;
    SourceFacts facts() const override;

private:
    std::string name_;
    // Closed on destruction (also when the constructor throws) unless it is stdin.
    static void close_unless_stdin(std::FILE* file);
    std::unique_ptr<std::FILE, void (*)(std::FILE*)> file_{nullptr, &close_unless_stdin};
    std::unique_ptr<XXH3_state_t, XXH_errorcode (*)(XXH3_state_t*)> hash_;
    uint64_t bytes_total_ = 0;
    uint64_t bytes_done_ = 0;
    std::function<void(uint64_t, uint64_t)> progress_;
    std::unique_ptr<CsvReader> reader_;
    CsvRecord record_;
};

}  // namespace credence
