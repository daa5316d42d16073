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
#include "model/assess/evaluate.hpp"
#include "model/data/catalogue.hpp"
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
    std::string catalogue_path;
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

std::string describe_verdict(const FitResult& r) {
    const ConvergenceSummary& c = r.convergence;
    std::string out = fmt::format(
        "convergence: {} after {} sweeps per chain ({}; max R-hat {:.3f}, min bulk ESS per chain {:.0f}, "
        "min tail ESS per chain {:.0f}, over every sweep of the last {} of {} chains)\n",
        c.verdict, r.sweeps_per_chain, stop_reason_name(r.stop_reason), c.max_rhat, c.min_ess_bulk_per_chain,
        c.min_ess_tail_per_chain, c.draws_per_chain, c.num_chains);
    for (const auto& w : c.warnings) out += "warning: " + w + "\n";
    for (const auto& a : c.advice) out += "advice: " + a + "\n";
    return out;
}

// The live line: where the chains are, and at checkpoints the worst figures.
std::string progress_line(const FitProgress& p, FitProgress& last_checkpoint) {
    if (p.checkpoint) last_checkpoint = p;
    std::string line = fmt::format("sampling {} chain{}{}: sweep {}/{} (budget {})  {}", p.chains,
                                   p.chains == 1 ? "" : "s", p.parallel_chains > 1 ? " in parallel" : "",
                                   p.sweeps_done, p.next_checkpoint, p.max_sweeps, format_duration(p.elapsed_s));
    if (p.train_rmse >= 0) line += fmt::format("  train RMSE {:.4f}", p.train_rmse);
    if (last_checkpoint.checkpoint) {
        line += fmt::format("  | at {}: worst R-hat {:.3f} ({}), min ESS/chain {:.0f} ({})",
                            last_checkpoint.sweeps_done, last_checkpoint.max_rhat, last_checkpoint.worst_rhat,
                            last_checkpoint.min_ess_per_chain, last_checkpoint.worst_ess);
        if (last_checkpoint.validation_rmse >= 0)
            line += fmt::format("  validation RMSE {:.4f}", last_checkpoint.validation_rmse);
    }
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
    const std::string length =
        options.run_length == RunLength::converged
            ? fmt::format("until R-hat <= {} and ESS >= {} per chain (at most {} sweeps per chain{}), keeping {} draws per chain",
                          options.convergence.max_rhat, options.convergence.min_ess_per_chain, options.max_sweeps,
                          options.max_seconds > 0 ? fmt::format(" or {:.0f} s", options.max_seconds) : "", options.samples)
            : fmt::format("{} burn-in + {} kept x thin {} sweeps per chain", options.burn_in, options.samples,
                          options.thin);
    log(fmt::format("fitting rank {} on {} ratings ({} customers, {} products), {} chains: {}", options.rank,
                    d.train.size(), d.train.users.size(), d.train.items.size(), options.chains, length));
    FitProgress last_checkpoint;
    FitResult result = fit_bpmf(d.train, options, d.validation.empty() ? nullptr : &d.validation,
                                [&](const FitProgress& p) {
                                    const std::string line = progress_line(p, last_checkpoint);
                                    progress.update(line, p.checkpoint);
                                    // Without a terminal, one log line per checkpoint instead.
                                    if (p.checkpoint && !progress.active()) log(line);
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

// ---- 4a. How the finished posterior does on the validation ratings (held
// out or given), stored beside the split so /v1/model and inspect --json
// can show calibration: RMSE and MAE of the clipped mean, mean log
// predictive density and the coverage of central intervals (model/assess/evaluate.hpp).
void add_validation_figures(Posterior& posterior, const TrainingData& d) {
    if (d.validation.empty()) return;
    RatingSet held;
    held.users = d.train.users;
    held.items = d.train.items;
    held.ratings = d.validation;
    held.scale = d.train.scale;
    // The engine only reads the posterior while this function runs: share it without owning it.
    const PredictionEngine engine(std::shared_ptr<const Posterior>(std::shared_ptr<void>(), &posterior));
    EvaluationOptions options;
    options.ranking = false;
    const nlohmann::json figures = to_json(evaluate(engine, held, options));
    nlohmann::json meta = nlohmann::json::parse(posterior.fit_metadata_json);
    for (const char* key : {"rmse", "mae", "mean_log_predictive_density", "coverage", "rated"})
        if (figures.contains(key)) meta["validation"][key] = figures[key];
    posterior.fit_metadata_json = meta.dump();
}

// ---- 4b. Names and categories from the catalogue for every product the
// model knows; catalogue rows for products without ratings are counted, not kept.
void attach_catalogue(Posterior& posterior, const Catalogue& catalogue, const Log& log) {
    posterior.item_names.assign(posterior.num_items, "");
    posterior.item_categories.assign(posterior.num_items, "");
    uint64_t named = 0;
    for (uint32_t i = 0; i < posterior.num_items; ++i) {
        auto it = catalogue.products.find(posterior.item_ids[i]);
        if (it == catalogue.products.end()) continue;
        posterior.item_names[i] = it->second.name;
        posterior.item_categories[i] = it->second.category;
        ++named;
    }
    nlohmann::json meta = nlohmann::json::parse(posterior.fit_metadata_json);
    const IngestSummary& c = catalogue.summary;
    meta["catalogue"] = {{"rows_read", c.rows_read}, {"kept", c.kept}, {"rejected", c.rejected},
                         {"merged_duplicates", c.merged_duplicates}, {"products_named", named}};
    posterior.fit_metadata_json = meta.dump();
    log(fmt::format("catalogue: named {} of {} rated products; {} catalogue products have no ratings", named,
                    posterior.num_items, catalogue.products.size() - named));
}

// ---- 5. Convergence figures, then the file. The figures travel with the
// model (inspect, /v1/model, report).
void write_model(FitResult& result, const std::string& out) {
    std::cerr << describe_verdict(result);

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

    std::optional<Catalogue> catalogue;
    if (!f.catalogue_path.empty()) {
        catalogue = read_catalogue(CatalogueOptions{.path = f.catalogue_path,
                                                    .max_reject_fraction = f.ingest.max_reject_fraction,
                                                    .rejects_path = ""});
        log("catalogue " + f.catalogue_path + ": " + describe(catalogue->summary));
    }
    IngestResult data = read_ratings(f, progress, log);
    const TrainingData d = split_for_validation(f, std::move(data.ratings), options.seed, log);
    FitResult result = sample_posterior(d, options, progress, log);
    add_fit_metadata(result.posterior, f, data.summary, d);
    add_validation_figures(result.posterior, d);
    if (catalogue) attach_catalogue(result.posterior, *catalogue, log);
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
    cmd->add_option("--catalogue", f->catalogue_path,
                    "Product catalogue CSV (product id, name, optional category) stored in the posterior so answers show names");
    cmd->add_flag("--quiet,-q", f->quiet, "No progress or summary on stderr");
    return [f] { return run_fit(*f); };
}

}  // namespace credence::cli
