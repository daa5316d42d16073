// credence fit: ratings export in, posterior file out.
#include <cmath>
#include <ctime>
#include <functional>
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

// Prints one line on stderr unless --quiet.
using Log = std::function<void(const std::string&)>;

// ---- 1. The ratings export, read with a progress line.
IngestResult read_ratings(const FitFlags& f, ProgressLine& progress, const Log& log) {
    IngestOptions ingest_options = to_ingest_options(f.ingest);
    ingest_options.progress = [&](uint64_t done, uint64_t total) {
        if (total > 0) progress.update(fmt::format("reading {}: {:.0f}%", f.ingest.path, 100.0 * done / total));
    };
    IngestResult data = ingest_ratings(ingest_options);
    progress.finish();
    log(describe(data.summary));
    return data;
}

// ---- 2. Training ratings and the ratings scored while fitting: a seeded
// holdout of the export, a separate file (--validation) or none.
struct TrainingData {
    RatingSet train;
    std::vector<Rating> validation;          // indices of `train`; empty: none
    nlohmann::json validation_meta = nullptr;  // recorded in the fit metadata
};

// The --validation file, mapped onto the training ids; pairs with an
// unknown customer or product are counted and skipped.
void read_validation_file(const FitFlags& f, TrainingData& d, const Log& log) {
    IngestFlags vflags = f.ingest;
    vflags.path = f.validation_path;
    vflags.rejects_path.clear();
    IngestResult v = ingest_ratings(to_ingest_options(vflags));
    MappedRatings mapped = map_onto(v.ratings, d.train.users, d.train.items);
    d.validation = std::move(mapped.ratings);
    d.validation_meta = {{"kind", "file"}, {"ratings", d.validation.size()},
                         {"unknown_user_pairs", mapped.unknown_user_pairs},
                         {"unknown_item_pairs", mapped.unknown_item_pairs},
                         {"fingerprint", v.summary.fingerprint}};
    log(fmt::format("validation: {} ratings with known ids ({} with unknown user, {} with unknown item skipped)",
                    d.validation.size(), mapped.unknown_user_pairs, mapped.unknown_item_pairs));
}

TrainingData split_for_validation(const FitFlags& f, RatingSet&& ratings, uint64_t seed, const Log& log) {
    TrainingData d;
    if (f.holdout) {
        HoldoutSplit split = split_holdout(std::move(ratings), *f.holdout, seed);
        d.train = std::move(split.train);
        d.validation = std::move(split.test);
        d.validation_meta = {{"kind", "holdout"}, {"fraction", *f.holdout}, {"ratings", d.validation.size()}};
        log(fmt::format("holding out {} ratings ({:.1f}%) for validation", d.validation.size(), 100 * *f.holdout));
    } else {
        d.train = std::move(ratings);
        if (!f.validation_path.empty()) read_validation_file(f, d, log);
    }
    if (d.train.size() == 0) throw DataError("no training ratings left to fit");
    return d;
}

// ---- 3. The Gibbs sampler, one progress line per sweep.
FitResult sample_posterior(const TrainingData& d, const FitOptions& options, ProgressLine& progress, const Log& log) {
    log(fmt::format("fitting rank {} on {} ratings ({} users, {} items): {} chains x ({} burn-in + {} kept x thin {}) sweeps",
                    options.rank, d.train.size(), d.train.users.size(), d.train.items.size(), options.chains,
                    options.burn_in, options.samples, options.thin));
    FitResult result = fit_bpmf(d.train, options, d.validation.empty() ? nullptr : &d.validation,
                                [&](const SweepReport& r) {
                                    const bool last = r.chain + 1 == options.chains && r.sweep + 1 == r.sweeps_per_chain;
                                    progress.update(sweep_line(r, options.chains), last);
                                });
    progress.finish();
    return result;
}

// ---- 4. What the file records about its making, beside the sampler's own
// metadata: data fingerprint and counts, version, time, validation.
void add_fit_metadata(Posterior& posterior, const FitFlags& f, const IngestSummary& summary, const TrainingData& d) {
    nlohmann::json meta = nlohmann::json::parse(posterior.fit_metadata_json, nullptr, false);
    if (meta.is_discarded() || !meta.is_object()) meta = nlohmann::json::object();
    meta["data_fingerprint"] = summary.fingerprint;
    meta["credence_version"] = kCredenceVersion;
    meta["created_at"] = utc_now_iso8601();
    meta["data"].update(nlohmann::json{{"source", f.ingest.path},
                                       {"rows_read", summary.rows_read},
                                       {"kept", summary.kept},
                                       {"rejected", summary.rejected},
                                       {"merged_duplicates", summary.merged_duplicates},
                                       {"training_ratings", d.train.size()}});
    meta["validation"] = d.validation_meta;
    posterior.fit_metadata_json = meta.dump();
}

// ---- 5. Convergence figures, then the file. The figures travel with the
// model (inspect, /v1/model, report).
void write_model(FitResult& result, const std::string& out) {
    const ConvergenceSummary convergence = summarize_convergence(result.posterior);
    result.posterior.diagnostics_json = to_json(convergence).dump();
    std::cerr << describe_verdict(convergence);

    const uint64_t bytes = write_posterior(result.posterior, out);
    const auto& trace = result.trace;
    std::cout << fmt::format("wrote {} ({:.1f} MB): {} kept samples from {} chains in {}; final train RMSE {:.4f}\n",
                             out, bytes / 1e6, result.posterior.num_samples, result.posterior.num_chains,
                             format_duration(result.seconds),
                             trace.train_rmse.empty() ? NAN : trace.train_rmse.back());
}

int run_fit(FitFlags& f) {
    if (f.holdout && !(*f.holdout > 0.0 && *f.holdout < 1.0))
        throw OptionError("--holdout must be strictly between 0 and 1");
    if (f.holdout && !f.validation_path.empty())
        throw OptionError("--holdout and --validation are alternatives; give one");
    const FitOptions options = to_fit_options(f.sampler);

    const Log log = [&](const std::string& s) { if (!f.quiet) std::cerr << s << "\n"; };
    ProgressLine progress(f.quiet);
    for (const auto& note : prepare_posterior_output(f.out)) log(note);  // before any sampling

    IngestResult data = read_ratings(f, progress, log);
    const TrainingData d = split_for_validation(f, std::move(data.ratings), options.seed, log);
    FitResult result = sample_posterior(d, options, progress, log);
    add_fit_metadata(result.posterior, f, data.summary, d);
    write_model(result, f.out);
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
