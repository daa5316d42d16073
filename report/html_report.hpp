// The model report: one self-contained HTML file (inline CSS and SVG, no
// scripts, no external assets; a Content-Security-Policy forbids loading
// any) that shows whether a fit can be trusted:
//   - trace plots per chain of the noise precision over every sweep,
//     burn-in included (the "trace" of Posterior::fit_metadata_json, written
//     by fit_bpmf: keys chain, sweep, noise_precision, train_rmse), and of
//     the probe predictions over kept samples (probes as chosen by
//     model/fit/convergence_summary.hpp);
//   - the R-hat / ESS table and verdict (summarize_convergence);
//   - the held-out check the fit stored (fit --holdout), beside the
//     product-mean baseline;
//   - the calibration curve and PIT histogram of a validation set, if given;
//   - predictive sd against the number of training ratings per item;
//   - the rank comparison table and plot, if a comparison is given.
#pragma once
#include <optional>
#include <string>

#include "model/assess/compare.hpp"
#include "model/assess/evaluate.hpp"
#include "model/posterior/posterior.hpp"

namespace credence::report {

struct ReportInputs {
    const Posterior* posterior = nullptr;      // required; must pass Posterior::validate()
    std::string model_name;                    // shown in the header (the file's name; never a path)
    std::optional<EvaluationReport> validation;
    std::string validation_name;               // shown with the calibration section; a file name, never a path
    std::optional<ComparisonResult> comparison;
    uint32_t max_probe_plots = 6;              // probe prediction traces drawn (of up to 20 probes)
};

// One line on whether the model is fit for use, from its convergence
// verdict and the held-out figures (a --validation report, else those the
// fit stored): "Fit for use: ...", "Not fit for use: ..." (not converged,
// or no better than the product-mean baseline on held-out ratings) or
// "Converged, accuracy unchecked: ..." (no held-out figures). Plain text.
std::string fitness_verdict(const ReportInputs& inputs);

// Returns the whole HTML document. Throws std::invalid_argument when
// posterior is null (a bug in the caller; so is any error of the plot writer,
// which is only given series the report built itself); a fit_metadata_json
// without a trace gives a section that says so instead of a plot.
std::string render_html_report(const ReportInputs& inputs);

}  // namespace credence::report
