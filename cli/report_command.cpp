// credence report: one self-contained HTML file about a fitted model
// (report/html_report.hpp).
#include <filesystem>
#include <fstream>
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "model/assess/compare.hpp"
#include "model/error.hpp"
#include "model/assess/evaluate.hpp"
#include "model/data/ingest.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"
#include "report/html_report.hpp"

namespace credence::cli {

namespace {

struct ReportFlags {
    std::string model;
    std::string validation;
    std::string comparison;
    std::string out;
    double relevance_threshold = 4.0;
    uint32_t k = 10;
};

int run_report(const ReportFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    report::ReportInputs in;
    in.posterior = posterior.get();
    // The file's name only: a report travels, and names no path on this machine.
    in.model_name = std::filesystem::path(f.model).filename().string();
    if (!f.validation.empty()) {
        IngestOptions io;
        io.path = f.validation;
        const IngestResult v = ingest_ratings(io);
        std::cerr << describe(v.summary) << "\n";
        EvaluationOptions eo;
        eo.ranking_k = f.k;
        eo.relevance_threshold = f.relevance_threshold;
        in.validation = evaluate(PredictionEngine(posterior), v.ratings, eo);
        in.validation_name = f.validation;
    }
    if (!f.comparison.empty()) {
        std::ifstream file(f.comparison);
        if (!file) throw FileError("cannot open comparison file " + f.comparison + "; check the path");
        const nlohmann::json j = nlohmann::json::parse(file, nullptr, false);
        if (j.is_discarded()) throw FormatError(f.comparison + " is not JSON; write it with credence compare --json");
        try {
            in.comparison = comparison_from_json(j);
        } catch (const FormatError& e) {
            throw FormatError(f.comparison + ": " + e.what());
        }
    }
    const std::string html = report::render_html_report(in);
    std::ofstream out(f.out, std::ios::binary | std::ios::trunc);
    out << html;
    out.close();
    if (!out) throw FileError("could not write " + f.out + " (check the directory exists and is writable)");
    std::cout << fmt::format("wrote {} ({:.0f} KB)\n", f.out, html.size() / 1024.0);
    return 0;
}

}  // namespace

Runner add_report_command(CLI::App& app) {
    auto f = std::make_shared<ReportFlags>();
    CLI::App* cmd = app.add_subcommand("report", "Write a self-contained HTML report: convergence, traces, calibration, uncertainty, rank comparison");
    cmd->add_option("model", f->model, "Posterior file")->required();
    cmd->add_option("--validation", f->validation, "Held-out ratings file (CSV/TSV, detected) for the calibration section");
    cmd->add_option("--comparison", f->comparison, "JSON written by credence compare --json");
    cmd->add_option("--out,-o", f->out, "HTML file to write")->required();
    cmd->add_option("--k", f->k, "List length for the top-k metrics of the validation set")
        ->check(CLI::Range(1u, 10000u))->capture_default_str();
    cmd->add_option("--relevance-threshold", f->relevance_threshold,
                    "A held-out rating at or above this counts as relevant (rating units)")->capture_default_str();
    return [f] { return run_report(*f); };
}

}  // namespace credence::cli
