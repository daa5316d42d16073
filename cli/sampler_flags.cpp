#include "cli/sampler_flags.hpp"

#include <charconv>
#include <cmath>
#include <map>
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
    if (rank == RankFlag::one)
        cmd.add_option("--rank", o.rank, "Number of latent factors K")->check(CLI::Range(1u, 512u))->capture_default_str();

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
    cmd.add_option("--max-sweeps", o.max_sweeps, "Converged runs: at most this many sweeps per chain")
        ->check(CLI::Range(2u, 100000000u))->capture_default_str()->group(kGroup);
    cmd.add_option("--time-limit", f.time_limit,
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
    cmd.add_option("--chains", o.chains, "Independent chains per fit (at least 2 for the convergence checks)")
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

FitOptions to_fit_options(const SamplerFlags& f) {
    FitOptions options = f.fit;
    if (options.run_length == RunLength::converged) {
        for (const CLI::Option* flag : {f.burn_in_flag, f.thin_flag})
            if (flag && flag->count() > 0)
                throw OptionError(flag->get_name() +
                                  " applies to --run-length fixed; a converged run (the default) burns in the first "
                                  "half of each chain and keeps --samples draws evenly spaced after it");
    }
    if (!f.time_limit.empty()) options.max_seconds = *parse_duration_s(f.time_limit);
    options.biases = !f.no_biases;
    if (f.fixed_noise_precision) {
        options.sample_noise = false;
        options.fixed_noise_precision = *f.fixed_noise_precision;
    }
    return options;
}

}  // namespace credence::cli
