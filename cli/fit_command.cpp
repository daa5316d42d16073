// credence fit: ratings export (a file or a database query) in, posterior
// file out; with the analyst's retraining loop around it: a held-out check
// stored in the file, a warm start from the live model, a refit on every
// rating after the check, and a gate that refuses to replace the live model
// when the new one is worse or did not converge (exit code 3, cli/main.cpp).
#include <algorithm>
#include <cmath>
#include <filesystem>
#include <functional>
#include <iostream>
#include <memory>
#include <optional>
#include <unordered_set>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "cli/output_paths.hpp"
#include "cli/progress.hpp"
#include "cli/sampler_flags.hpp"
#include "generated/credence_version.hpp"
#include "model/assess/evaluate.hpp"
#include "model/assess/rank_choice.hpp"
#include "model/assess/release_gate.hpp"
#include "model/data/catalogue.hpp"
#include "model/data/holdout.hpp"
#include "model/data/ingest.hpp"
#include "model/error.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/fit/sampler.hpp"
#include "model/fit/warm_start.hpp"
#include "model/posterior/posterior.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct FitFlags {
    IngestFlags ingest;
    std::string out;
    SamplerFlags sampler;
    std::optional<double> holdout;
    std::string validation_path;
    std::string catalogue_path;
    std::string holdout_out;
    bool refit_on_all = false;
    std::string warm_start;
    bool gate = false;
    bool quiet = false;
};

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

// Flags that only make sense together, checked before any work.
void check_flags(const FitFlags& f) {
    if (f.holdout && !(*f.holdout > 0.0 && *f.holdout < 1.0))
        throw OptionError("--holdout must be strictly between 0 and 1");
    if (f.holdout && !f.validation_path.empty())
        throw OptionError("--holdout and --validation are alternatives; give one");
    if (!f.holdout_out.empty() && !f.holdout)
        throw OptionError("--holdout-out writes the ratings --holdout sets aside; add --holdout 0.1 (for example)");
    if (f.refit_on_all && !f.holdout)
        throw OptionError("--refit-on-all refits on the ratings --holdout set aside; add --holdout 0.1 (for example)");
    if (f.gate && !f.holdout && f.validation_path.empty())
        throw OptionError("--gate compares the new model with the live one on held-out ratings; add --holdout 0.1 "
                          "(for example) or --validation FILE");
    if (!f.warm_start.empty() && !std::filesystem::exists(f.warm_start))
        throw FileError(fmt::format("--warm-start {}: no such file; give the live model's posterior file", f.warm_start));
    // No output may replace an input (--warm-start may be --out: the nightly
    // loop starts from the live model and replaces it).
    const std::vector<NamedPath> inputs{{"--ratings", f.ingest.path},
                                        {"--catalogue", f.catalogue_path},
                                        {"--validation", f.validation_path}};
    refuse_overwriting_inputs({"--out", f.out}, inputs);
    if (!f.holdout_out.empty()) {
        std::vector<NamedPath> taken = inputs;
        taken.push_back({"--out", f.out});
        taken.push_back({"--warm-start", f.warm_start});
        refuse_overwriting_inputs({"--holdout-out", f.holdout_out}, taken);
        check_output_folder({"--holdout-out", f.holdout_out});
    }
}

// ---- 1. The ratings, read with a progress line.
IngestResult read_ratings(const FitFlags& f, ProgressLine& progress, const Log& log) {
    IngestOptions ingest_options = to_ingest_options(f.ingest);
    ingest_options.progress = [&](uint64_t done, uint64_t total) {
        if (total > 0) progress.update(fmt::format("reading {}: {:.0f}%", f.ingest.path, 100.0 * done / total));
        else progress.update(fmt::format("reading {}: {} rows", f.ingest.path, done));
    };
    IngestResult data = ingest_ratings(ingest_options);
    progress.finish();
    log(describe(data.summary));
    // Rows dropped with nowhere to keep them are said even under --quiet.
    if (data.summary.rejected > 0 && data.summary.rejects_path.empty())
        std::cerr << fmt::format("warning: {} rejected rows of {} were not saved; give --rejects-path to keep them\n",
                                 data.summary.rejected, f.ingest.path == "-" ? "standard input" : f.ingest.path);
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
    vflags.query.clear();
    vflags.rejects_path.clear();
    IngestResult v = ingest_ratings(to_ingest_options(vflags));
    log("validation " + f.validation_path + ": " + describe(v.summary));
    MappedRatings mapped = map_onto(v.ratings, d.train.users, d.train.items);
    d.validation = std::move(mapped.ratings);
    d.validation_meta = {{"kind", "file"}, {"ratings", d.validation.size()},
                         {"unknown_user_pairs", mapped.unknown_user_pairs},
                         {"unknown_item_pairs", mapped.unknown_item_pairs},
                         {"fingerprint", v.summary.fingerprint}};
    log(fmt::format("validation: {} ratings with known ids ({} with unknown user, {} with unknown item skipped)",
                    d.validation.size(), mapped.unknown_user_pairs, mapped.unknown_item_pairs));
    // Pairs the fit trains on make the check look better than it is.
    std::unordered_set<uint64_t> trained;
    trained.reserve(d.train.size());
    for (const Rating& r : d.train.ratings) trained.insert(uint64_t(r.user) << 32 | r.item);
    const size_t in_training = static_cast<size_t>(std::count_if(
        d.validation.begin(), d.validation.end(),
        [&](const Rating& r) { return trained.count(uint64_t(r.user) << 32 | r.item) > 0; }));
    if (in_training > 0)
        std::cerr << fmt::format("warning: {} of the {} validation ratings are (customer, product) pairs of the "
                                 "training ratings, so the check flatters the model; give a file of ratings that are "
                                 "not in --ratings, or use --holdout\n",
                                 in_training, d.validation.size());
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

// The validation ratings as a rating set of their own (the training ids).
RatingSet validation_set(const TrainingData& d) {
    RatingSet v;
    v.users = d.train.users;
    v.items = d.train.items;
    v.scale = d.train.scale;
    v.ratings = d.validation;
    return v;
}

// Every rating again, held-out ones included, sorted by (user, item) as
// ingest returns them.
RatingSet all_ratings(const TrainingData& d) {
    RatingSet all = validation_set(d);
    all.ratings.insert(all.ratings.end(), d.train.ratings.begin(), d.train.ratings.end());
    std::sort(all.ratings.begin(), all.ratings.end(),
              [](const Rating& a, const Rating& b) { return a.user != b.user ? a.user < b.user : a.item < b.item; });
    return all;
}

// ---- 2b. The rank: --rank K as given; under auto (the default) the
// warm-start model's, else chosen from the training ratings by short fits on
// a holdout of them (model/assess/rank_choice.hpp). Returns the record kept in
// the fit metadata ("rank_choice"), null for a given rank.
nlohmann::json settle_rank(const FitFlags& f, const RatingSet& train, const Posterior* old, FitOptions& options,
                           const Log& log) {
    RankChoiceOptions choice_options;
    const std::optional<uint32_t> given = rank_request(f.sampler, choice_options.candidates);
    if (given) return nullptr;  // to_fit_options already set it
    if (old) {
        options.rank = old->rank;
        log(fmt::format("rank {}: the warm-start model's (--rank auto keeps it, so the chains can start from its "
                        "draws)", options.rank));
        return {{"rank", options.rank}, {"source", "warm_start"}};
    }
    log(fmt::format("choosing the rank among {} (--rank auto): short fits, scored on {:.0f}% of the training "
                    "ratings held out",
                    SamplerFlags::join_ranks(choice_options.candidates), 100 * choice_options.holdout_fraction));
    const RankChoice choice = choose_rank(train, options, choice_options, log);
    options.rank = choice.rank;
    log(describe(choice));
    nlohmann::json record = to_json(choice);
    record["source"] = "held_out";
    return record;
}

// ---- 3. The Gibbs sampler, one progress line per sweep.
FitResult sample_posterior(const RatingSet& train, const std::vector<Rating>& validation, const FitOptions& options,
                           const WarmStart* start, const std::string& what, ProgressLine& progress, const Log& log) {
    const std::string length =
        options.run_length == RunLength::converged
            ? fmt::format("until R-hat <= {} and ESS >= {} per chain (at most {} sweeps per chain{}), keeping {} draws per chain",
                          options.convergence.max_rhat, options.convergence.min_ess_per_chain, options.max_sweeps,
                          options.max_seconds > 0 ? fmt::format(" or {:.0f} s", options.max_seconds) : "", options.samples)
            : fmt::format("{} burn-in + {} kept x thin {} sweeps per chain", options.burn_in, options.samples,
                          options.thin);
    log(fmt::format("{} rank {} on {} ratings ({} customers, {} products), {} chains{}: {}", what, options.rank,
                    train.size(), train.users.size(), train.items.size(), options.chains,
                    start ? " from a warm start" : "", length));
    FitProgress last_checkpoint;
    FitResult result = fit_bpmf(train, options, validation.empty() ? nullptr : &validation,
                                [&](const FitProgress& p) {
                                    const std::string line = progress_line(p, last_checkpoint);
                                    progress.update(line, p.checkpoint);
                                    // Without a terminal, one log line per checkpoint instead.
                                    if (p.checkpoint && !progress.active()) log(line);
                                },
                                start);
    progress.finish();
    return result;
}

// The old model's draws as the chains' start, with what changed since.
std::optional<WarmStart> warm_start(const FitFlags& f, const Posterior* old, const RatingSet& train,
                                    const FitOptions& options, const Log& log) {
    if (!old) return std::nullopt;
    WarmStart w = warm_start_from(*old, f.warm_start, train, options);
    const auto& r = w.record;
    log(fmt::format("warm start from {}: {} customers and {} products kept, {} and {} new, {} and {} dropped; "
                    "burn-in {}",
                    f.warm_start, r["customers_kept"].get<uint64_t>(), r["products_kept"].get<uint64_t>(),
                    r["customers_new"].get<uint64_t>(), r["products_new"].get<uint64_t>(),
                    r["customers_dropped"].get<uint64_t>(), r["products_dropped"].get<uint64_t>(),
                    r["burn_in_rule"].get<std::string>()));
    return w;
}

// ---- 4. The held-out check: the model and the product-mean baseline on
// the validation ratings; printed and stored in the file.
nlohmann::json held_out_figures(const Posterior& posterior, const TrainingData& d, const Log& log) {
    if (d.validation.empty()) return nullptr;
    EvaluationOptions eo;
    eo.ranking = false;
    const auto shared = std::shared_ptr<const Posterior>(&posterior, [](const Posterior*) {});
    const EvaluationReport r = evaluate(PredictionEngine(shared), validation_set(d), eo);
    auto number = [](double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); };
    const BaselineFigures& b = r.baseline;
    nlohmann::json j = {{"ratings", r.rated},
                        {"rmse", number(r.rmse)},
                        {"mae", number(r.mae)},
                        {"mean_log_predictive_density", number(r.mean_log_predictive_density)},
                        {"coverage", r.coverage}};
    if (b.available)
        j["baseline"] = {{"kind", "product_mean"},
                         {"rmse", number(b.rmse)},
                         {"mae", number(b.mae)},
                         {"mean_log_predictive_density", number(b.mean_log_predictive_density)},
                         {"coverage", b.coverage}};
    const double cover90 = r.coverage.count("0.9") ? r.coverage.at("0.9") : NAN;
    log(fmt::format("held-out check on {} ratings: RMSE {:.4f} (product-mean baseline {:.4f}), mean log predictive "
                    "density {:.4f} (baseline {:.4f}), 90% interval coverage {:.3f}",
                    r.rated, r.rmse, b.available ? b.rmse : NAN, r.mean_log_predictive_density,
                    b.available ? b.mean_log_predictive_density : NAN, cover90));
    return j;
}

// ---- 5. The gate: the checked model against the live one at --out, on the
// held-out ratings (judge_release applies the rule).
std::optional<PairedAccuracy> live_accuracy(const FitFlags& f, const Posterior& checked, const TrainingData& d,
                                            const Log& log) {
    if (!std::filesystem::exists(f.out)) return std::nullopt;
    const Posterior live = read_posterior(f.out);
    PairedAccuracy a = paired_accuracy(live, checked, validation_set(d));
    log(fmt::format("gate: on {} held-out ratings both models know and neither was trained on ({} skipped for an "
                    "unknown id, {} as training pairs): mean log predictive density {:.4f} live, {:.4f} new "
                    "(difference {:+.4f}, SE {:.4f}); RMSE {:.4f} live, {:.4f} new",
                    a.compared, a.unknown, a.trained, a.before_log_density, a.after_log_density,
                    a.log_density_difference, a.log_density_difference_se, a.before_rmse, a.after_rmse));
    return a;
}

// ---- 6. What the file records about its making, beside the sampler's own
// metadata: data fingerprint and counts, version, time, validation.
void add_fit_metadata(Posterior& posterior, const FitFlags& f, const IngestSummary& summary, const TrainingData& d,
                      const nlohmann::json& figures, const nlohmann::json& extra) {
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
    if (!f.ingest.query.empty()) meta["data"]["query"] = f.ingest.query;
    meta["validation"] = d.validation_meta;
    if (!figures.is_null()) meta["validation"]["figures"] = figures;
    meta.update(extra);
    posterior.fit_metadata_json = meta.dump();
}

uint64_t write_file(const Posterior& p, const std::string& path, const FitResult& r) {
    const uint64_t bytes = write_posterior(p, path);
    const auto& trace = r.trace;
    std::cout << fmt::format("wrote {} ({:.1f} MB): {} kept samples from {} chains in {}; final train RMSE {:.4f}\n",
                             path, bytes / 1e6, p.num_samples, p.num_chains, format_duration(r.seconds),
                             trace.train_rmse.empty() ? NAN : trace.train_rmse.back());
    return bytes;
}

// ---- 6b. Names and categories from the catalogue for every product the
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

int run_fit(FitFlags& f) {
    check_flags(f);
    FitOptions options = to_fit_options(f.sampler);
    const Log log = [&](const std::string& s) { if (!f.quiet) std::cerr << s << "\n"; };
    ProgressLine progress(f.quiet);
    for (const auto& note : prepare_posterior_output(f.out)) log(note);  // before any sampling
    // The gate compares with the live model after sampling: read it now, so a
    // damaged live file stops the run before the work, not after.
    if (f.gate && std::filesystem::exists(f.out)) (void)read_posterior(f.out);

    std::optional<Catalogue> catalogue;
    if (!f.catalogue_path.empty()) {
        catalogue = read_catalogue(CatalogueOptions{.path = f.catalogue_path,
                                                    .max_reject_fraction = f.ingest.max_reject_fraction,
                                                    .rejects_path = ""});
        log("catalogue " + f.catalogue_path + ": " + describe(catalogue->summary));
    }
    IngestResult data = read_ratings(f, progress, log);
    const TrainingData d = split_for_validation(f, std::move(data.ratings), options.seed, log);
    std::optional<Posterior> old;
    if (!f.warm_start.empty()) old = read_posterior(f.warm_start);
    nlohmann::json extra = nlohmann::json::object();
    if (nlohmann::json rank = settle_rank(f, d.train, old ? &*old : nullptr, options, log); !rank.is_null())
        extra["rank_choice"] = std::move(rank);
    const std::optional<WarmStart> start = warm_start(f, old ? &*old : nullptr, d.train, options, log);
    old.reset();
    FitResult result = sample_posterior(d.train, d.validation, options, start ? &*start : nullptr, "fitting",
                                        progress, log);
    std::cerr << describe_verdict(result);
    const nlohmann::json figures = held_out_figures(result.posterior, d, log);
    if (!f.holdout_out.empty()) {
        write_ratings_csv(d.validation, d.train.users, d.train.items, f.holdout_out);
        log(fmt::format("wrote the {} held-out ratings to {}", d.validation.size(), f.holdout_out));
    }
    std::vector<std::string> verdicts{result.convergence.verdict};

    // The accuracy is the checked fit's: a refit has seen the held-out ratings.
    std::optional<PairedAccuracy> accuracy;
    if (f.gate) accuracy = live_accuracy(f, result.posterior, d, log);
    if (f.refit_on_all) {
        // The check is done; the served model uses every rating, starting
        // where the checked fit ended (the same ids, a few more ratings).
        const RatingSet all = all_ratings(d);
        const WarmStart from_check = warm_start_from(result.posterior, "the held-out check fit", all, options);
        FitResult refit = sample_posterior(all, {}, options, &from_check, "refitting on every rating:", progress, log);
        std::cerr << describe_verdict(refit);
        verdicts.push_back(refit.convergence.verdict);
        extra["refit_on_all"] = {{"ratings", all.size()},
                                 {"checked_fit_verdict", result.convergence.verdict},
                                 {"checked_fit_sweeps_per_chain", result.sweeps_per_chain},
                                 {"note", "the held-out figures are those of the fit without the held-out ratings; "
                                          "this model was refitted on every rating after that check"}};
        result = std::move(refit);
    }
    std::optional<GateDecision> decision;
    if (f.gate) {
        decision = judge_release(accuracy ? &*accuracy : nullptr, verdicts);
        for (const auto& n : decision->notes) log("gate: " + n);
    }
    if (decision) extra["gate"] = decision->record;
    add_fit_metadata(result.posterior, f, data.summary, d, figures, extra);
    if (catalogue) attach_catalogue(result.posterior, *catalogue, log);
    if (decision && !decision->pass) {
        const std::string candidate = f.out + ".candidate";
        write_file(result.posterior, candidate, result);
        std::cerr << fmt::format("gate: refused to replace {}:\n", f.out);
        for (const auto& r : decision->reasons) std::cerr << "  - " << r << "\n";
        std::cerr << fmt::format("gate: the live model {} is unchanged; the new one is in {} (compare them with "
                                 "credence delta {} {})\n",
                                 f.out, candidate, f.out, candidate);
        return kExitGateRefused;
    }
    if (decision) log("gate: passed; replacing " + f.out);
    write_file(result.posterior, f.out, result);
    return 0;
}

}  // namespace

Runner add_fit_command(CLI::App& app) {
    auto f = std::make_shared<FitFlags>();
    CLI::App* cmd = app.add_subcommand("fit", "Fit the model to a ratings export or database query by Gibbs sampling and write a posterior file");
    add_ingest_flags(*cmd, f->ingest);
    cmd->add_option("--out,-o", f->out, "Posterior file to write (replaced atomically)")->required();
    add_sampler_flags(*cmd, f->sampler, RankFlag::one_or_auto);
    cmd->add_option("--holdout", f->holdout, "Hold out this share of ratings: scored while fitting and after, figures stored in the file")->check(CLI::Range(0.0, 1.0));
    cmd->add_option("--catalogue", f->catalogue_path,
                    "Product catalogue CSV (product id, name, optional category) stored in the posterior so answers show names");
    cmd->add_option("--validation", f->validation_path, "Ratings file scored while fitting and after (instead of --holdout)");
    cmd->add_option("--holdout-out", f->holdout_out, "Write the held-out ratings here (CSV) for evaluate and report --validation");
    cmd->add_flag("--refit-on-all", f->refit_on_all, "After the held-out check, refit on every rating and write that model");
    cmd->add_option("--warm-start", f->warm_start, "Start the chains from this earlier posterior file of the same model (e.g. the live one)");
    cmd->add_flag("--gate", f->gate, "Replace --out only if the new model converged and is not worse than the model now in --out "
                                     "on held-out ratings (by more than 2 paired SE); otherwise write <out>.candidate and exit 3");
    cmd->add_flag("--quiet,-q", f->quiet, "No progress lines or notes on stderr; the verdict, warnings and advice still print");
    return [f] { return run_fit(*f); };
}

}  // namespace credence::cli
