// credence fit: ratings export in, posterior file out.
#include <cmath>
#include <ctime>
#include <iostream>
#include <optional>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "cli/progress.hpp"
#include "cli/sampler_flags.hpp"
#include "generated/credence_version.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/error.hpp"
#include "model/data/holdout.hpp"
#include "model/data/ingest.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/fit/sampler.hpp"

namespace credence::cli {

namespace {

struct FitFlags {
    IngestFlags ingest;
    std::string out;
    SamplerFlags sampler;
    std::optional<double> holdout;
    std::string validation_path;
    bool quiet = false;
};

std::string utc_now_iso8601() {
    const std::time_t now = std::time(nullptr);
    std::tm tm{};
    gmtime_r(&now, &tm);
    char buf[32];
    std::strftime(buf, sizeof buf, "%Y-%m-%dT%H:%M:%SZ", &tm);
    return buf;
}

std::string describe_verdict(const ConvergenceSummary& c) {
    std::string out = fmt::format("convergence: {} (max R-hat {:.3f}, min bulk ESS per chain {:.0f}, min tail ESS per chain {:.0f}; "
                                  "{} chains x {} draws)\n",
                                  c.verdict, c.max_rhat, c.min_ess_bulk_per_chain, c.min_ess_tail_per_chain,
                                  c.num_chains, c.draws_per_chain);
    for (const auto& w : c.warnings) out += "warning: " + w + "\n";
    return out;
}

std::string sweep_line(const SweepReport& r, uint32_t chains) {
    const double total = static_cast<double>(r.sweeps_per_chain) * chains;
    const double done = static_cast<double>(r.chain) * r.sweeps_per_chain + r.sweep + 1;
    const double eta = r.elapsed_s / done * (total - done);
    std::string line = fmt::format("chain {}/{} sweep {}/{}{}  elapsed {}  ETA {}  train RMSE {:.4f}",
                                   r.chain + 1, chains, r.sweep + 1, r.sweeps_per_chain,
                                   r.kept ? " (kept)" : "", format_duration(r.elapsed_s),
                                   format_duration(eta), r.train_rmse);
    if (r.validation_rmse >= 0) line += fmt::format("  validation RMSE {:.4f}", r.validation_rmse);
    return line;
}

int run_fit(FitFlags& f) {
    if (f.holdout && !(*f.holdout > 0.0 && *f.holdout < 1.0))
        throw std::invalid_argument("--holdout must be strictly between 0 and 1");
    if (f.holdout && !f.validation_path.empty())
        throw std::invalid_argument("--holdout and --validation are alternatives; give one");
    const FitOptions options = to_fit_options(f.sampler);

    auto log = [&](const std::string& s) { if (!f.quiet) std::cerr << s << "\n"; };
    ProgressLine progress(f.quiet);

    IngestOptions ingest_options = to_ingest_options(f.ingest);
    ingest_options.progress = [&](uint64_t done, uint64_t total) {
        if (total > 0) progress.update(fmt::format("reading {}: {:.0f}%", f.ingest.path, 100.0 * done / total));
    };
    IngestResult data = ingest_ratings(ingest_options);
    progress.finish();
    log(describe(data.summary));

    RatingSet train;
    std::vector<Rating> validation;
    nlohmann::json validation_meta = nullptr;
    if (f.holdout) {
        HoldoutSplit split = split_holdout(std::move(data.ratings), *f.holdout, options.seed);
        train = std::move(split.train);
        validation = std::move(split.test);
        validation_meta = {{"kind", "holdout"}, {"fraction", *f.holdout}, {"ratings", validation.size()}};
        log(fmt::format("holding out {} ratings ({:.1f}%) for validation", validation.size(), 100 * *f.holdout));
    } else {
        train = std::move(data.ratings);
        if (!f.validation_path.empty()) {
            IngestFlags vflags = f.ingest;
            vflags.path = f.validation_path;
            vflags.rejects_path.clear();
            IngestResult v = ingest_ratings(to_ingest_options(vflags));
            MappedRatings mapped = map_onto(v.ratings, train.users, train.items);
            validation = std::move(mapped.ratings);
            validation_meta = {{"kind", "file"}, {"ratings", validation.size()},
                               {"unknown_user_pairs", mapped.unknown_user_pairs},
                               {"unknown_item_pairs", mapped.unknown_item_pairs},
                               {"fingerprint", v.summary.fingerprint}};
            log(fmt::format("validation: {} ratings with known ids ({} with unknown user, {} with unknown item skipped)",
                            validation.size(), mapped.unknown_user_pairs, mapped.unknown_item_pairs));
        }
    }
    if (train.size() == 0) throw DataError("no training ratings left to fit");

    log(fmt::format("fitting rank {} on {} ratings ({} users, {} items): {} chains x ({} burn-in + {} kept x thin {}) sweeps",
                    options.rank, train.size(), train.users.size(), train.items.size(), options.chains,
                    options.burn_in, options.samples, options.thin));
    FitResult result = fit_bpmf(train, options, validation.empty() ? nullptr : &validation,
                                [&](const SweepReport& r) {
                                    const bool last = r.chain + 1 == options.chains && r.sweep + 1 == r.sweeps_per_chain;
                                    progress.update(sweep_line(r, options.chains), last);
                                });
    progress.finish();

    nlohmann::json meta = nlohmann::json::parse(result.posterior.fit_metadata_json, nullptr, false);
    if (meta.is_discarded() || !meta.is_object()) meta = nlohmann::json::object();
    meta["data_fingerprint"] = data.summary.fingerprint;
    meta["credence_version"] = kCredenceVersion;
    meta["created_at"] = utc_now_iso8601();
    meta["data"].update(nlohmann::json{{"source", f.ingest.path},
                                       {"rows_read", data.summary.rows_read},
                                       {"kept", data.summary.kept},
                                       {"rejected", data.summary.rejected},
                                       {"merged_duplicates", data.summary.merged_duplicates},
                                       {"training_ratings", train.size()}});
    meta["validation"] = validation_meta;
    result.posterior.fit_metadata_json = meta.dump();

    // Convergence figures travel with the model (inspect, /v1/model, report).
    const ConvergenceSummary convergence = summarize_convergence(result.posterior);
    result.posterior.diagnostics_json = to_json(convergence).dump();
    std::cerr << describe_verdict(convergence);

    const uint64_t bytes = write_posterior(result.posterior, f.out);
    const auto& trace = result.trace;
    std::cout << fmt::format("wrote {} ({:.1f} MB): {} kept samples from {} chains in {}; final train RMSE {:.4f}\n",
                             f.out, bytes / 1e6, result.posterior.num_samples, result.posterior.num_chains,
                             format_duration(result.seconds),
                             trace.train_rmse.empty() ? NAN : trace.train_rmse.back());
    return 0;
}

}  // namespace

Runner add_fit_command(CLI::App& app) {
    auto f = std::make_shared<FitFlags>();
    CLI::App* cmd = app.add_subcommand("fit", "Fit the model to a ratings export by Gibbs sampling and write a posterior file");
    add_ingest_flags(*cmd, f->ingest);
    cmd->add_option("--out,-o", f->out, "Posterior file to write (replaced atomically)")->required();
    add_sampler_flags(*cmd, f->sampler, RankFlag::one);
    cmd->add_option("--holdout", f->holdout, "Hold out this share of ratings to report validation RMSE while fitting")->check(CLI::Range(0.0, 1.0));
    cmd->add_option("--validation", f->validation_path, "Ratings file scored by the running posterior mean while fitting");
    cmd->add_flag("--quiet,-q", f->quiet, "No progress or summary on stderr");
    return [f] { return run_fit(*f); };
}

}  // namespace credence::cli
