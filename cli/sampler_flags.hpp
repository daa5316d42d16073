// The sampler's command-line flags, declared once for every subcommand that
// fits models (fit, compare): chain lengths, chains, seed, threads, biases,
// noise, initial factors and hyperpriors (model/fit/sampler.hpp, FitOptions).
// Help texts live only here; the defaults shown are the FitOptions values the
// caller starts from, so no default is written twice.
#pragma once
#include <CLI/CLI.hpp>
#include <optional>

#include "model/fit/sampler.hpp"

namespace credence::cli {

struct SamplerFlags {
    // `defaults` are the values --help shows and parsing starts from:
    // FitOptions{} for fit, CompareOptions{}.fit for compare.
    explicit SamplerFlags(const FitOptions& defaults = {}) : fit(defaults) {}

    FitOptions fit;                                // parsed values land here
    bool no_biases = false;                        // --no-biases
    std::optional<double> fixed_noise_precision;   // --fixed-noise-precision; unset: tau is sampled
};

// Whether the subcommand takes one rank (--rank K) or chooses ranks itself
// (compare --ranks), in which case no --rank flag is declared.
enum class RankFlag { one, chosen_elsewhere };

// Declares the sampler flags on `cmd`, bound to `flags` (which must outlive
// parsing). --rank goes with the subcommand's own options; every other flag
// goes in the "Sampler" help section, identical in every subcommand. Values
// outside a flag's range are refused while parsing (CLI11 usage errors).
void add_sampler_flags(CLI::App& cmd, SamplerFlags& flags, RankFlag rank);

// The options the flags ask for: flags.fit with biases off under --no-biases
// and the noise precision fixed under --fixed-noise-precision.
FitOptions to_fit_options(const SamplerFlags& flags);

}  // namespace credence::cli
