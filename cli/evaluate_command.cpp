// credence evaluate: score a posterior file on held-out ratings.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "model/assess/evaluate.hpp"
#include "model/data/ingest.hpp"
#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct EvaluateFlags {
    std::string model;
    IngestFlags ingest;
    bool json = false;
    uint32_t k = 10;
    double relevance_threshold = 4.0;
    bool no_ranking = false;
};

void print_table(const EvaluationReport& report) {
    const BaselineFigures& b = report.baseline;
    auto base = [&](double v) { return b.available ? fmt::format("{:>10.4f}", v) : fmt::format("{:>10}", "-"); };
    std::cout << fmt::format("scored {} ratings ({} pairs with an unknown user, {} with an unknown item skipped)\n",
                             report.rated, report.unknown_users, report.unknown_items);
    std::cout << fmt::format("  {:<30} {:>10} {:>10}\n", "", "model", "baseline");
    std::cout << fmt::format("  {:<30} {:>10.4f} {}\n", "RMSE", report.rmse, base(b.rmse));
    std::cout << fmt::format("  {:<30} {:>10.4f} {}\n", "MAE", report.mae, base(b.mae));
    std::cout << fmt::format("  {:<30} {:>10.4f} {}\n", "mean log predictive density",
                             report.mean_log_predictive_density, base(b.mean_log_predictive_density));
    for (const auto& [level, share] : report.coverage) {
        const auto it = b.coverage.find(level);
        std::cout << fmt::format("  {:<30} {:>10.3f} {}\n", fmt::format("coverage of the {} interval", level), share,
                                 b.available && it != b.coverage.end() ? fmt::format("{:>10.3f}", it->second)
                                                                       : fmt::format("{:>10}", "-"));
    }
    std::cout << (b.available ? "  baseline: each product's mean training rating, spread by the pooled residual sd\n"
                              : "  baseline: not stored in this model file (refit to add it)\n");
    const PitHistogram& h = report.pit_histogram;
    std::cout << fmt::format("  PIT histogram ({} bins; uniform when calibrated; chi-square {:.1f} on {} df):\n   ",
                             h.counts.size(), h.chi_square, h.degrees_of_freedom);
    for (uint64_t c : h.counts) std::cout << fmt::format(" {}", c);
    std::cout << "\n";
    if (!report.ranking.empty()) {
        std::cout << fmt::format("  top-{} lists over products not rated in training; relevant: held-out rating >= {:g}\n",
                                 report.ranking_k, report.relevance_threshold);
        std::cout << fmt::format("    {:<6} {:>12} {:>10} {:>9} {:>10} {:>10}\n", "rank by", "precision@k",
                                 "recall@k", "NDCG@k", "coverage", "customers");
        for (const auto& [mode, m] : report.ranking)
            std::cout << fmt::format("    {:<6} {:>12.4f} {:>10.4f} {:>9.4f} {:>10.4f} {:>10}\n", mode, m.precision_at_k,
                                     m.recall_at_k, m.ndcg_at_k, m.catalogue_coverage, m.users_evaluated);
    }
}

int run_evaluate(const EvaluateFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    IngestOptions options = to_ingest_options(f.ingest);
    IngestResult test = ingest_ratings(options);
    // On stderr in both forms, so rejected rows are seen even when the JSON is piped on.
    std::cerr << describe(test.summary) << "\n";
    PredictionEngine engine(posterior);
    EvaluationOptions eo;
    eo.ranking = !f.no_ranking;
    eo.ranking_k = f.k;
    eo.relevance_threshold = f.relevance_threshold;
    EvaluationReport report = evaluate(engine, test.ratings, eo);
    require_scored(report, f.model, f.ingest.path);
    // Warnings go to stderr in both forms, so they are seen even when the JSON is piped on.
    for (const auto& w : report.warnings) std::cerr << "warning: " << w << "\n";
    if (f.json) {
        std::cout << to_json(report).dump(2) << "\n";
        return 0;
    }
    print_table(report);
    return 0;
}

}  // namespace

Runner add_evaluate_command(CLI::App& app) {
    auto f = std::make_shared<EvaluateFlags>();
    CLI::App* cmd = app.add_subcommand("evaluate", "Score a posterior file on held-out ratings: accuracy and interval calibration");
    cmd->add_option("--model,-m", f->model, "Posterior file")->required();
    add_ingest_flags(*cmd, f->ingest);
    cmd->add_flag("--json", f->json, "Print one JSON object instead of a table");
    cmd->add_option("--k", f->k, "List length for precision@k, recall@k and NDCG@k")
        ->check(CLI::Range(1u, 10000u))->capture_default_str();
    cmd->add_option("--relevance-threshold", f->relevance_threshold,
                    "A held-out rating at or above this counts as relevant (rating units; 4 suits a 1..5 scale)")
        ->capture_default_str();
    cmd->add_flag("--no-ranking", f->no_ranking, "Skip the top-k ranking metrics (they score every product per customer)");
    return [f] { return run_evaluate(*f); };
}

}  // namespace credence::cli
