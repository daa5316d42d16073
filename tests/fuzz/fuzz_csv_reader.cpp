// libFuzzer target: the CSV reader and the ingest over any bytes. The reader
// runs with tiny buffers so refills fall everywhere; the ingest checks its
// accounting. Built by scripts/fuzz (clang, -fsanitize=fuzzer); seeds in
// tests/fuzz/corpus/csv_reader.
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <string>

#include "model/data/csv_reader.hpp"
#include "model/data/ingest.hpp"
#include "model/error.hpp"

namespace {

void read_all(const uint8_t* data, size_t size) {
    std::FILE* file = fmemopen(const_cast<uint8_t*>(data), size, "rb");
    if (!file) return;
    credence::CsvReader reader(file, {}, 256, 64);
    const char delimiters[] = {',', '\t', ';', '|'};
    reader.set_delimiter(delimiters[size ? data[0] % 4 : 0]);
    reader.set_max_record_lines(size > 1 ? 1 + data[1] % 8 : 8);
    credence::CsvRecord record;
    uint64_t last_line = 0;
    while (reader.next(record)) {
        // Records come in file order and never end before they start.
        if (record.line <= last_line || record.end_line < record.line) std::abort();
        last_line = record.end_line;
    }
    std::fclose(file);
}

void ingest(const uint8_t* data, size_t size) {
    static const std::string path = "/dev/shm/credence-fuzz-csv-" + std::to_string(::getpid()) + ".csv";
    std::FILE* out = std::fopen(path.c_str(), "wb");
    if (!out) return;
    std::fwrite(data, 1, size, out);
    std::fclose(out);
    credence::IngestOptions options;
    options.path = path;
    options.rejects_path = path + ".rejects";
    options.max_reject_fraction = 1.0;
    try {
        const auto result = credence::ingest_ratings(options);
        const auto& s = result.summary;
        if (s.rows_read != s.kept + s.rejected + s.merged_duplicates) std::abort();
        if (s.lines_read != s.header_lines + s.blank_lines + s.row_lines) std::abort();
        if (result.ratings.ratings.size() != s.kept) std::abort();
    } catch (const credence::Error&) {
        // Refused input (no rows, no delimiter, UTF-16, ...) is an answer.
    }
}

}  // namespace

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
    if (size > 1 << 16) return 0;
    read_all(data, size);
    ingest(data, size);
    return 0;
}
