// Checks on the files a subcommand will write, made before any work: an
// output never replaces one of the command's own inputs, and its folder
// exists. Used by cli/fit_command.cpp and cli/report_command.cpp (posterior
// files have their own, fuller check: model/posterior/posterior_file.hpp's
// prepare_posterior_output).
#pragma once
#include <string>
#include <utility>
#include <vector>

namespace credence::cli {

// A path given on the command line and the flag that gave it ("--out").
struct NamedPath {
    std::string flag;
    std::string path;
};

// Throws OptionError (exit 2) naming both flags when `output` is the same
// file as one of `inputs`: the same inode when both exist (so a symlink or
// another spelling is caught), else the same absolute, normalised path.
// Inputs with an empty path, "-" (standard input) or a database source
// (sqlite:..., postgresql://...) are skipped. Never touches the files.
// `flag` may be a description for a positional argument ("the model").
void refuse_overwriting_inputs(const NamedPath& output, const std::vector<NamedPath>& inputs);

// Throws FileError naming the flag when `output`'s folder does not exist or
// is not a folder, when the folder is not writable, or when `output` itself
// is a folder. Creates nothing.
void check_output_folder(const NamedPath& output);

}  // namespace credence::cli
