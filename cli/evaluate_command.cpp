// credence evaluate: score a posterior file on held-out ratings.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "model/assess/evaluate.hpp"
#include "model/data/ingest.hpp"
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

int run_evaluate(const EvaluateFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    IngestOptions options = to_ingest_options(f.ingest);
    IngestResult test = ingest_ratings(options);
    PredictionEngine engine(posterior);
    EvaluationOptions eo;
    eo.ranking = !f.no_ranking;
    eo.ranking_k = f.k;
    eo.relevance_threshold = f.relevance_threshold;
    EvaluationReport report = evaluate(engine, test.ratings, eo);
    nlohmann::json j = to_json(report);
    if (f.json) {
        std::cout << j.dump(2) << "\n";
        return 0;
    }
    std::cerr << describe(test.summary) << "\n";
    std::cout << fmt::format("scored {} ratings ({} pairs with an unknown user, {} with an unknown item skipped)\n",
                             report.rated, report.unknown_users, report.unknown_items);
    std::cout << fmt::format("  RMSE  {:.4f}\n  MAE   {:.4f}\n  mean log predictive density  {:.4f}\n",
                             report.rmse, report.mae, report.mean_log_predictive_density);
    std::cout << "  interval coverage (share of ratings inside the central interval):\n";
    for (const auto& [level, share] : report.coverage)
        std::cout << fmt::format("    {:>5}  {:.3f}\n", level, share);
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
