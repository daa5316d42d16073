// credence compare: fit several ranks (optionally with and without biases)
// on held-out splits of one ratings export and recommend one (model/assess/compare.hpp).
#include <iostream>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "cli/sampler_flags.hpp"
#include "model/assess/compare.hpp"
#include "model/error.hpp"
#include "model/data/ingest.hpp"

namespace credence::cli {

namespace {

// Starts from CompareOptions{}: its values are the defaults --help shows.
struct CompareFlags {
    IngestFlags ingest;
    CompareOptions defaults;
    std::string ranks = SamplerFlags::join_ranks(defaults.ranks);
    uint32_t folds = defaults.folds;
    double holdout = defaults.holdout_fraction;
    bool both_bias_settings = defaults.both_bias_settings;
    bool json = false;
    bool quiet = false;
    SamplerFlags sampler{defaults.fit};
};

int run_compare(const CompareFlags& f) {
    CompareOptions o = f.defaults;
    o.ranks = parse_rank_list(f.ranks, "--ranks");
    o.folds = f.folds;
    o.holdout_fraction = f.holdout;
    o.both_bias_settings = f.both_bias_settings;
    o.fit = to_fit_options(f.sampler);
    o.split_seed = o.fit.seed;
    const IngestResult data = ingest_ratings(to_ingest_options(f.ingest));
    if (!f.quiet) std::cerr << describe(data.summary) << "\n";
    if (data.ratings.size() == 0) throw DataError("no ratings left to compare models on");
    auto log = [&](const std::string& line) { if (!f.quiet) std::cerr << line << "\n"; };
    ComparisonResult result = compare_models(data.ratings, o, log);
    result.data_fingerprint = data.summary.fingerprint;
    result.settings["data"] = {{"source", f.ingest.path}, {"ratings", data.ratings.size()}};
    if (!f.ingest.query.empty()) result.settings["data"]["query"] = f.ingest.query;
    if (f.json) std::cout << to_json(result).dump(2) << "\n";
    else std::cout << format_table(result);
    return 0;
}

}  // namespace

Runner add_compare_command(CLI::App& app) {
    auto f = std::make_shared<CompareFlags>();
    CLI::App* cmd = app.add_subcommand(
        "compare", "Fit several ranks on held-out splits and recommend the simplest within one SE of the best");
    add_ingest_flags(*cmd, f->ingest);
    cmd->add_option("--ranks", f->ranks, "Comma-separated ranks to fit")->capture_default_str();
    cmd->add_option("--folds", f->folds, "K-fold cross-validation with K folds; below 2: one holdout split")
        ->check(CLI::Range(0u, 100u))->capture_default_str();
    CLI::Option* holdout = cmd->add_option("--holdout", f->holdout, "Share of ratings held out when --folds is below 2")
        ->check(CLI::Range(0.0, 1.0))->capture_default_str();
    cmd->add_flag("--with-without-biases", f->both_bias_settings, "Fit every rank both with and without bias terms");
    cmd->add_flag("--json", f->json, "Print one JSON object (readable by credence report --comparison) instead of a table");
    cmd->add_flag("--quiet,-q", f->quiet, "No progress lines on stderr");
    add_sampler_flags(*cmd, f->sampler, RankFlag::chosen_elsewhere);
    // Fitting both bias settings and leaving biases out contradict each other.
    // Checked here rather than with Option::excludes, which would also mark
    // --no-biases in the Sampler help section that fit and compare share.
    cmd->parse_complete_callback([f, holdout] {
        if (f->both_bias_settings && f->sampler.no_biases)
            throw CLI::ExcludesError("--with-without-biases", "--no-biases");
        // K folds hold out 1/K each; a --holdout share would be ignored.
        if (f->folds >= 2 && holdout->count() > 0)
            throw CLI::ParseError("--holdout sets the share of one split; with --folds " + std::to_string(f->folds) +
                                      " each fold holds out 1/" + std::to_string(f->folds) + " of the ratings. Give "
                                      "one of the two",
                                  2);
    });
    return [f] { return run_compare(*f); };
}

}  // namespace credence::cli
