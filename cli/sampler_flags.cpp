#include "cli/sampler_flags.hpp"

#include <charconv>
#include <cmath>
#include <string>

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

    // Chain lengths. The ranges keep burn_in + samples x thin below 2^32 sweeps.
    cmd.add_option("--burn-in", o.burn_in, "Sweeps discarded at the start of each chain")
        ->check(CLI::Range(0u, 1000000u))->capture_default_str()->group(kGroup);
    cmd.add_option("--samples", o.samples, "Samples kept per chain")
        ->check(CLI::Range(1u, 100000u))->capture_default_str()->group(kGroup);
    cmd.add_option("--thin", o.thin, "Sweeps between kept samples")
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

FitOptions to_fit_options(const SamplerFlags& f) {
    FitOptions options = f.fit;
    options.biases = !f.no_biases;
    if (f.fixed_noise_precision) {
        options.sample_noise = false;
        options.fixed_noise_precision = *f.fixed_noise_precision;
    }
    return options;
}

}  // namespace credence::cli
