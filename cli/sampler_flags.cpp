#include "cli/sampler_flags.hpp"

#include <charconv>
#include <cmath>
#include <map>
#include <sstream>
#include <string>

#include "model/error.hpp"

namespace credence::cli {

namespace {

constexpr const char* kGroup = "Sampler";

// A finite number strictly above `bound` (the sampler refuses anything else,
// model/fit/sampler.cpp); `name` is what --help shows after the type.
CLI::Validator finite_above(double bound, const std::string& name) {
    return CLI::Validator(
        [bound](std::string& text) -> std::string {
            double value = 0.0;
            const auto [end, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
            if (ec != std::errc() || end != text.data() + text.size() || !std::isfinite(value))
                return "'" + text + "' is not a finite number";
            if (!(value > bound)) return "'" + text + "' must be above " + CLI::detail::to_string(bound);
            return {};
        },
        name);
}

CLI::Validator finite_number() {
    return CLI::Validator(
        [](std::string& text) -> std::string {
            double value = 0.0;
            const auto [end, ec] = std::from_chars(text.data(), text.data() + text.size(), value);
            if (ec != std::errc() || end != text.data() + text.size() || !std::isfinite(value))
                return "'" + text + "' is not a finite number";
            return {};
        },
        "FINITE");
}

}  // namespace

void add_sampler_flags(CLI::App& cmd, SamplerFlags& f, RankFlag rank) {
    FitOptions& o = f.fit;
    HyperpriorOptions& p = f.fit.prior;
    const auto positive = finite_above(0.0, "POSITIVE");
    if (rank == RankFlag::one_or_auto) {
        cmd.add_option("--rank", f.rank,
                       "Number of latent factors K (1 to 512), or auto: the simplest of --auto-ranks whose held-out "
                       "log density is within one SE of the best, from short fits with " +
                           CLI::detail::to_string(100 * RankChoiceOptions{}.holdout_fraction) +
                           "% of the training ratings held out (a warm start keeps its model's rank)")
            ->check(CLI::Validator(
                [](std::string& text) -> std::string {
                    if (text == "auto") return {};
                    try {
                        parse_rank_list(text, "--rank");
                    } catch (const OptionError&) {
                        return "'" + text + "' is neither auto nor a whole number from 1 to 512";
                    }
                    return text.find(',') == std::string::npos ? std::string() : "give one rank, or auto";
                },
                "K|auto"))
            ->capture_default_str();
        f.auto_ranks_flag = cmd.add_option("--auto-ranks", f.auto_ranks, "--rank auto: the ranks to choose among")
                                ->capture_default_str();
    }

    // Run length (model/fit/sampler.hpp). The ranges keep burn_in + samples x
    // thin below 2^32 sweeps.
    const std::map<std::string, RunLength> lengths{{"converged", RunLength::converged}, {"fixed", RunLength::fixed}};
    cmd.add_option("--run-length", o.run_length,
                   "converged: sample until R-hat <= 1.01 and bulk and tail ESS >= 100 per chain for every monitored "
                   "quantity, or a budget (--max-sweeps, --time-limit) runs out; fixed: --burn-in + --samples x "
                   "--thin sweeps per chain")
        ->transform(CLI::CheckedTransformer(lengths, CLI::ignore_case))
        ->default_str(o.run_length == RunLength::converged ? "converged" : "fixed")->group(kGroup);
    cmd.add_option("--samples", o.samples, "Draws kept per chain, evenly spaced after burn-in (the file grows with it)")
        ->check(CLI::Range(1u, 100000u))->capture_default_str()->group(kGroup);
    f.max_sweeps_flag = cmd.add_option("--max-sweeps", o.max_sweeps, "Converged runs: at most this many sweeps per chain")
        ->check(CLI::Range(2u, 100000000u))->capture_default_str()->group(kGroup);
    f.time_limit_flag = cmd.add_option("--time-limit", f.time_limit,
                   "Converged runs: stop at the last check that fits in this wall-clock time (e.g. 90, 90s, 15m, 2h; "
                   "0: none)")
        ->check(CLI::Validator([](std::string& text) -> std::string {
                    return parse_duration_s(text) ? std::string() : "'" + text + "' is not a duration like 90, 90s, 15m or 2h";
                }, "DURATION"))
        ->default_str(o.max_seconds > 0 ? CLI::detail::to_string(o.max_seconds) : "0")->group(kGroup);
    f.burn_in_flag = cmd.add_option("--burn-in", o.burn_in, "Fixed runs: sweeps discarded at the start of each chain")
        ->check(CLI::Range(0u, 1000000u))->capture_default_str()->group(kGroup);
    f.thin_flag = cmd.add_option("--thin", o.thin, "Fixed runs: sweeps between kept draws")
        ->check(CLI::Range(1u, 10000u))->capture_default_str()->group(kGroup);
    cmd.add_option("--chains", o.chains, "Independent chains per fit (R-hat compares chains; with 1 it compares the halves of the one chain, which "
                   "misses a chain stuck in one mode)")
        ->check(CLI::Range(1u, 64u))->capture_default_str()->group(kGroup);
    cmd.add_option("--seed", o.seed,
                   "Random seed for the chains and any held-out split; the same seed gives the same samples on any "
                   "thread count")
        ->capture_default_str()->group(kGroup);
    cmd.add_option("--threads", o.threads, "Worker threads (0: all cores)")
        ->check(CLI::Range(0, 1024))->capture_default_str()->group(kGroup);

    // Model terms.
    cmd.add_flag("--no-biases", f.no_biases, "Leave out the customer and product bias terms")->group(kGroup);
    cmd.add_option("--fixed-noise-precision", f.fixed_noise_precision,
                   "Fix the noise precision tau at this value instead of sampling it")
        ->check(positive)->group(kGroup);
    cmd.add_option("--init-scale", o.init_scale,
                   "Standard deviation of the random initial factors; negative: automatic, "
                   "(rating variance / 2K)^(1/4)")
        ->check(finite_number())->capture_default_str()->group(kGroup);

    // Hyperpriors (the model in model/fit/sampler.hpp).
    cmd.add_option("--prior-beta0", p.beta0, "Normal-Wishart prior on the factors: beta0, the weight of the prior mean 0")
        ->check(positive)->capture_default_str()->group(kGroup);
    cmd.add_option("--prior-nu0-minus-rank", p.nu0_minus_rank,
                   "Normal-Wishart prior on the factors: degrees of freedom nu0 = K + this (above -1)")
        ->check(finite_above(-1.0, "ABOVE -1"))->capture_default_str()->group(kGroup);
    cmd.add_option("--prior-w0-scale", p.w0_scale, "Normal-Wishart prior on the factors: scale matrix W0 = this x I")
        ->check(positive)->capture_default_str()->group(kGroup);
    cmd.add_option("--noise-prior-shape", p.noise_shape, "Gamma prior on the noise precision tau: shape")
        ->check(positive)->capture_default_str()->group(kGroup);
    cmd.add_option("--noise-prior-rate", p.noise_rate, "Gamma prior on the noise precision tau: rate")
        ->check(positive)->capture_default_str()->group(kGroup);
    cmd.add_option("--bias-prior-shape", p.bias_shape, "Gamma prior on the bias precisions: shape")
        ->check(positive)->capture_default_str()->group(kGroup);
    cmd.add_option("--bias-prior-rate", p.bias_rate, "Gamma prior on the bias precisions: rate")
        ->check(positive)->capture_default_str()->group(kGroup);
}

std::optional<double> parse_duration_s(const std::string& text) {
    if (text.empty()) return std::nullopt;
    double scale = 1.0;
    std::string number = text;
    switch (text.back()) {
        case 's': scale = 1.0; number.pop_back(); break;
        case 'm': scale = 60.0; number.pop_back(); break;
        case 'h': scale = 3600.0; number.pop_back(); break;
        default: break;
    }
    double value = 0.0;
    const auto [end, ec] = std::from_chars(number.data(), number.data() + number.size(), value);
    if (number.empty() || ec != std::errc() || end != number.data() + number.size() || !std::isfinite(value) ||
        value < 0.0)
        return std::nullopt;
    return value * scale;
}

std::string SamplerFlags::join_ranks(const std::vector<uint32_t>& ranks) {
    std::string text;
    for (uint32_t r : ranks) text += (text.empty() ? "" : ",") + std::to_string(r);
    return text;
}

std::vector<uint32_t> parse_rank_list(const std::string& text, const std::string& flag) {
    std::vector<uint32_t> ranks;
    std::stringstream in(text);
    for (std::string part; std::getline(in, part, ',');) {
        uint32_t r = 0;
        const auto [end, ec] = std::from_chars(part.data(), part.data() + part.size(), r);
        if (part.empty() || ec != std::errc() || end != part.data() + part.size() || r == 0 || r > 512)
            throw OptionError(flag + ": '" + part + "' is not a rank between 1 and 512 (give e.g. 2,4,8)");
        ranks.push_back(r);
    }
    if (ranks.empty()) throw OptionError(flag + ": give at least one rank (e.g. 2,4,8)");
    return ranks;
}

std::optional<uint32_t> rank_request(const SamplerFlags& f, std::vector<uint32_t>& candidates) {
    if (f.rank != "auto") {
        if (f.auto_ranks_flag && f.auto_ranks_flag->count() > 0)
            throw OptionError("--auto-ranks applies to --rank auto (the default); drop it or drop --rank " + f.rank);
        return parse_rank_list(f.rank, "--rank").front();
    }
    candidates = parse_rank_list(f.auto_ranks, "--auto-ranks");
    return std::nullopt;
}

FitOptions to_fit_options(const SamplerFlags& f) {
    FitOptions options = f.fit;
    std::vector<uint32_t> unused;
    if (f.auto_ranks_flag) {  // fit: --rank K sets the rank; auto leaves the default until chosen
        if (const auto k = rank_request(f, unused)) options.rank = *k;
    }
    if (options.run_length == RunLength::converged) {
        for (const CLI::Option* flag : {f.burn_in_flag, f.thin_flag})
            if (flag && flag->count() > 0)
                throw OptionError(flag->get_name() +
                                  " applies to --run-length fixed; a converged run discards the first quarter of each "
                                  "chain as burn-in and keeps --samples draws evenly spaced after it");
    } else {
        for (const CLI::Option* flag : {f.max_sweeps_flag, f.time_limit_flag})
            if (flag && flag->count() > 0)
                throw OptionError(flag->get_name() +
                                  " applies to --run-length converged; a fixed run does exactly --burn-in + "
                                  "--samples x --thin sweeps per chain");
    }
    if (!f.time_limit.empty()) options.max_seconds = *parse_duration_s(f.time_limit);
    options.biases = !f.no_biases;
    if (f.fixed_noise_precision) {
        options.sample_noise = false;
        options.fixed_noise_precision = *f.fixed_noise_precision;
    }
    check_fit_options(options);  // before any data is read
    return options;
}

}  // namespace credence::cli
