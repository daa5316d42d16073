// credence report: one self-contained HTML file about a fitted model
// (report/html_report.hpp).
#include <filesystem>
#include <fstream>
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/output_paths.hpp"
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
    double max_reject_fraction = 0.01;  // of the --validation file's rows
    double relevance_threshold = 4.0;
    uint32_t k = 10;
};

// A comparison is evidence about a model only when it was made on the data
// the model was fitted to: the data fingerprints must match.
void require_same_data(const ComparisonResult& c, const Posterior& p, const std::string& comparison,
                       const std::string& model) {
    const auto meta = nlohmann::json::parse(p.fit_metadata_json, nullptr, false);
    const std::string fitted = meta.is_object() ? meta.value("data_fingerprint", std::string()) : std::string();
    if (c.data_fingerprint.empty())
        throw DataError(fmt::format("{} records no data fingerprint (written by an older credence compare), so it "
                                    "cannot be matched to {}; rerun credence compare --json on the model's ratings",
                                    comparison, model));
    if (fitted.empty())
        throw DataError(fmt::format("{} records no data fingerprint, so {} cannot be matched to it; refit the model",
                                    model, comparison));
    if (c.data_fingerprint != fitted)
        throw DataError(fmt::format("{} was made on other data (fingerprint {}) than {} was fitted to ({}); rerun "
                                    "credence compare --json on the model's ratings",
                                    comparison, c.data_fingerprint, model, fitted));
}

int run_report(const ReportFlags& f) {
    refuse_overwriting_inputs({"--out", f.out},
                              {{"the model", f.model}, {"--validation", f.validation}, {"--comparison", f.comparison}});
    check_output_folder({"--out", f.out});
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    report::ReportInputs in;
    in.posterior = posterior.get();
    // The file's name only: a report travels, and names no path on this machine.
    in.model_name = std::filesystem::path(f.model).filename().string();
    if (!f.validation.empty()) {
        IngestOptions io;
        io.path = f.validation;
        io.max_reject_fraction = f.max_reject_fraction;
        const IngestResult v = ingest_ratings(io);
        std::cerr << describe(v.summary) << "\n";
        EvaluationOptions eo;
        eo.ranking_k = f.k;
        eo.relevance_threshold = f.relevance_threshold;
        in.validation = evaluate(PredictionEngine(posterior), v.ratings, eo);
        require_scored(*in.validation, f.model, f.validation);
        in.validation_name = std::filesystem::path(f.validation).filename().string();  // as the model's: no path
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
        require_same_data(*in.comparison, *posterior, f.comparison, f.model);
    }
    const std::string html = report::render_html_report(in);
    std::ofstream out(f.out, std::ios::binary | std::ios::trunc);
    out << html;
    out.close();
    if (!out) throw FileError("could not write " + f.out + " (check the directory exists and is writable)");
    std::cout << fmt::format("wrote {} ({:.0f} KB)\n{}\n", f.out, html.size() / 1024.0, report::fitness_verdict(in));
    return 0;
}

}  // namespace

Runner add_report_command(CLI::App& app) {
    auto f = std::make_shared<ReportFlags>();
    CLI::App* cmd = app.add_subcommand("report", "Write a self-contained HTML report: convergence, traces, calibration, uncertainty, rank comparison");
    cmd->add_option("model", f->model, "Posterior file")->required();
    cmd->add_option("--validation", f->validation, "Held-out ratings file (CSV/TSV, detected) for the calibration section");
    cmd->add_option("--comparison", f->comparison, "JSON written by credence compare --json");
    cmd->add_option("--max-reject-fraction", f->max_reject_fraction,
                    "Stop if more than this share of the --validation file's rows is rejected")
        ->check(CLI::Range(0.0, 1.0))
        ->capture_default_str();
    cmd->add_option("--out,-o", f->out, "HTML file to write")->required();
    cmd->add_option("--k", f->k, "List length for the top-k metrics of the validation set")
        ->check(CLI::Range(1u, 10000u))->capture_default_str();
    cmd->add_option("--relevance-threshold", f->relevance_threshold,
                    "A held-out rating at or above this counts as relevant (rating units)")->capture_default_str();
    return [f] { return run_report(*f); };
}

}  // namespace credence::cli
