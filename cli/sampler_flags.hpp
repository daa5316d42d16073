// The sampler's command-line flags, declared once for every subcommand that
// fits models (fit, compare): chain lengths, chains, seed, threads, biases,
// noise, initial factors and hyperpriors (model/fit/sampler.hpp, FitOptions).
// Help texts live only here; the defaults shown are the FitOptions values the
// caller starts from, so no default is written twice.
#pragma once
#include <CLI/CLI.hpp>
#include <cstdint>
#include <optional>
#include <string>
#include <vector>

#include "model/assess/rank_choice.hpp"
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
    CLI::Option* max_sweeps_flag = nullptr;
    CLI::Option* time_limit_flag = nullptr;
    // fit only (RankFlag::one_or_auto): --rank as given, "auto" or K, and
    // the candidates for auto; see rank_request.
    std::string rank = "auto";
    std::string auto_ranks = join_ranks(RankChoiceOptions{}.candidates);
    CLI::Option* auto_ranks_flag = nullptr;

    static std::string join_ranks(const std::vector<uint32_t>& ranks);
};

// The ranks in a comma-separated list such as "2,4,8" (compare --ranks, fit
// --auto-ranks). Throws OptionError naming `flag` and the first entry that is
// not a whole number from 1 to 512; repeats are left to the caller's checks.
std::vector<uint32_t> parse_rank_list(const std::string& text, const std::string& flag);

// What fit's --rank asks for: K, or nullopt for "auto" (choose from the data
// among `candidates`, which holds the parsed --auto-ranks then). Throws
// OptionError when --auto-ranks is given with a fixed rank, or its list does
// not parse.
std::optional<uint32_t> rank_request(const SamplerFlags& flags, std::vector<uint32_t>& candidates);

// Seconds in a duration written as 90, 90s, 15m or 2h; nullopt when the text
// is none of these or negative.
std::optional<double> parse_duration_s(const std::string& text);

// Whether the subcommand takes one rank (fit: --rank K, or auto to choose it
// from the data among --auto-ranks) or compares ranks itself (compare
// --ranks), in which case neither flag is declared.
enum class RankFlag { one_or_auto, chosen_elsewhere };

// Declares the sampler flags on `cmd`, bound to `flags` (which must outlive
// parsing). --rank goes with the subcommand's own options; every other flag
// goes in the "Sampler" help section, identical in every subcommand. Values
// outside a flag's range are refused while parsing (CLI11 usage errors).
void add_sampler_flags(CLI::App& cmd, SamplerFlags& flags, RankFlag rank);

// The options the flags ask for: flags.fit with biases off under --no-biases,
// the noise precision fixed under --fixed-noise-precision and the time limit
// in seconds. The rank is FitOptions{}.rank's unless --rank gives one (see
// rank_request). Throws OptionError when --burn-in or --thin is given for a
// converged run, --max-sweeps or --time-limit for a fixed one, or when
// check_fit_options (model/fit/sampler.hpp) refuses the result, so every
// such mistake stops the command before it reads any data.
FitOptions to_fit_options(const SamplerFlags& flags);

}  // namespace credence::cli
