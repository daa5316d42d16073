// credence evaluate: score a posterior file on held-out ratings.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "model/evaluate.hpp"
#include "model/ingest.hpp"
#include "model/posterior_file.hpp"
#include "model/predict.hpp"

namespace credence::cli {

namespace {

struct EvaluateFlags {
    std::string model;
    IngestFlags ingest;
    bool json = false;
};

int run_evaluate(const EvaluateFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    IngestOptions options = to_ingest_options(f.ingest);
    IngestResult test = ingest_ratings(options);
    PredictionEngine engine(posterior);
    EvaluationReport report = evaluate(engine, test.ratings, EvaluationOptions{});
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
    return 0;
}

}  // namespace

Runner add_evaluate_command(CLI::App& app) {
    auto f = std::make_shared<EvaluateFlags>();
    CLI::App* cmd = app.add_subcommand("evaluate", "Score a posterior file on held-out ratings: accuracy and interval calibration");
    cmd->add_option("--model,-m", f->model, "Posterior file")->required()->check(CLI::ExistingFile);
    add_ingest_flags(*cmd, f->ingest);
    cmd->add_flag("--json", f->json, "Print one JSON object instead of a table");
    return [f] { return run_evaluate(*f); };
}

}  // namespace credence::cli
