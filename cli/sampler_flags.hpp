// The sampler's command-line flags, declared once for every subcommand that
// fits models (fit, compare): chain lengths, chains, seed, threads, biases,
// noise, initial factors and hyperpriors (model/fit/sampler.hpp, FitOptions).
// Help texts live only here; the defaults shown are the FitOptions values the
// caller starts from, so no default is written twice.
#pragma once
#include <CLI/CLI.hpp>
#include <optional>
#include <string>

#include "model/fit/sampler.hpp"

namespace credence::cli {

struct SamplerFlags {
    // `defaults` are the values --help shows and parsing starts from:
    // FitOptions{} for fit, CompareOptions{}.fit for compare.
    explicit SamplerFlags(const FitOptions& defaults = {}) : fit(defaults) {}

    FitOptions fit;                                // parsed values land here
    bool no_biases = false;                        // --no-biases
    std::optional<double> fixed_noise_precision;   // --fixed-noise-precision; unset: tau is sampled
    std::string time_limit;                        // --time-limit as given; empty: fit.max_seconds
    CLI::Option* burn_in_flag = nullptr;           // set by add_sampler_flags, to tell whether they were given
    CLI::Option* thin_flag = nullptr;
};

// Seconds in a duration written as 90, 90s, 15m or 2h; nullopt when the text
// is none of these or negative.
std::optional<double> parse_duration_s(const std::string& text);

// Whether the subcommand takes one rank (--rank K) or chooses ranks itself
// (compare --ranks), in which case no --rank flag is declared.
enum class RankFlag { one, chosen_elsewhere };

// Declares the sampler flags on `cmd`, bound to `flags` (which must outlive
// parsing). --rank goes with the subcommand's own options; every other flag
// goes in the "Sampler" help section, identical in every subcommand. Values
// outside a flag's range are refused while parsing (CLI11 usage errors).
void add_sampler_flags(CLI::App& cmd, SamplerFlags& flags, RankFlag rank);

// The options the flags ask for: flags.fit with biases off under --no-biases,
// the noise precision fixed under --fixed-noise-precision and the time limit
// in seconds. Throws OptionError when --burn-in or --thin is given for a
// converged run (they apply to fixed runs only).
FitOptions to_fit_options(const SamplerFlags& flags);

}  // namespace credence::cli
