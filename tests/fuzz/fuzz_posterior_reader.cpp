// libFuzzer target: the posterior file reader over any bytes. It must refuse
// (FileError, FormatError) or return a posterior that validates; never crash,
// never allocate beyond the input's size. Built by scripts/fuzz; seeds
// (small valid files) in tests/fuzz/corpus/posterior_reader.
#include <unistd.h>

#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <string>

#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"

extern "C" int LLVMFuzzerTestOneInput(const uint8_t* data, size_t size) {
    static const std::string path = "/dev/shm/credence-fuzz-posterior-" + std::to_string(::getpid());
    std::FILE* out = std::fopen(path.c_str(), "wb");
    if (!out) return 0;
    std::fwrite(data, 1, size, out);
    std::fclose(out);
    try {
        const credence::Posterior p = credence::read_posterior(path);
        p.validate();  // what the reader returns is whole
    } catch (const credence::Error&) {
    }
    return 0;
}
