// The posterior file: Credence's own versioned, checksummed binary container
// for a Posterior. The byte layout is specified in model/posterior/FORMAT.md; this
// header is the only code that should know it.
#pragma once
#include <cstdint>
#include <string>
#include <vector>

#include "model/posterior/posterior.hpp"

namespace credence {

inline constexpr uint32_t kPosteriorFormatVersion = 1;

// Writes `posterior` to `path` atomically: bytes go to a temporary file in
// the same directory, which is flushed, fsync'd and renamed over `path` (and
// the directory fsync'd). SIGINT or SIGTERM during the write remove the
// temporary file before the signal takes effect (the previous handler, or
// the default, then runs). On any failure the temporary file is removed, the
// previous file under `path` (if any) is untouched, and FileError is thrown
// ("cannot write <path>: <reason>"). A posterior that fails
// Posterior::validate(), repeats an id or carries invalid JSON is refused
// with std::invalid_argument before anything is created (a bug in the
// caller: the sampler builds consistent posteriors). Returns the number of
// bytes written.
uint64_t write_posterior(const Posterior& posterior, const std::string& path);

// Prepares `path` for write_posterior before the work that produces the
// posterior (a fit checks its --out before sampling): the directory exists,
// a file can be created in it, and `path` is not a directory or other
// non-regular file. Removes temporary files of this target left by writers
// that no longer run (killed outright) and returns one line per such file:
// what was removed, or left and why. Throws FileError ("cannot write
// <path>: ...; choose another --out") when the file could not be written.
std::vector<std::string> prepare_posterior_output(const std::string& path);

// Reads and fully validates a posterior file: magic, version, section table,
// every section's checksum and size, and Posterior::validate(). Throws
// FileError when the file cannot be opened or read (missing, not a regular
// file, an I/O error) and FormatError when its bytes are not a valid
// posterior file (truncated, wrong version, checksum mismatch in section X,
// ...); both messages start with the path. Never crashes or allocates beyond
// the file's size on a corrupt file.
Posterior read_posterior(const std::string& path);

}  // namespace credence
