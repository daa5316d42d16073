// Calibration of predictive distributions against held-out ratings: the
// probability integral transform (PIT), its histogram, and the coverage curve
// of central credible intervals. Plain vectors in, so evaluation code can
// pass whatever it computed per (user, item) pair.
//
// PIT of a pair = F(y), the predictive CDF at the observed rating. For a
// calibrated continuous predictive the PIT values are Uniform(0, 1)
// (Dawid 1984; Gneiting, Balabdaoui & Raftery 2007, "Probabilistic forecasts,
// calibration and sharpness", JRSS B 69(2)). A U-shaped histogram means
// intervals too narrow (overconfident); a hump means too wide.
//
// Coverage at level L = share of pairs whose rating falls in the central
// L-interval [F^-1((1-L)/2), F^-1((1+L)/2)]. For a continuous F that is the
// same event as (1-L)/2 <= PIT <= (1+L)/2, so the curve can be computed from
// PIT values alone, or from interval membership the caller computed itself.
// Each point carries the binomial standard error sqrt(L (1-L) / n) a
// calibrated model's coverage would have, to judge gaps.
#pragma once
#include <cstdint>
#include <span>
#include <vector>

#include <nlohmann/json.hpp>

namespace credence {

// 0.10, 0.15, ..., 0.95 and 0.99 (19 levels).
std::vector<double> default_coverage_levels();

struct PitHistogram {
    std::vector<uint64_t> counts;  // bin b holds PIT in [b/B, (b+1)/B); the last bin also holds 1
    uint64_t total = 0;
    double chi_square = 0.0;       // Pearson statistic against equal counts, B - 1 degrees of freedom
    uint32_t degrees_of_freedom = 0;
};

struct CoveragePoint {
    double level = 0.0;     // nominal
    uint64_t inside = 0;
    uint64_t total = 0;
    double coverage = 0.0;  // inside / total; NaN when total is 0
    double standard_error = 0.0;  // sqrt(level (1 - level) / total); NaN when total is 0
};

// Needs bins >= 1 and every PIT value finite in [0, 1]; throws
// std::invalid_argument otherwise: a value outside means the CDF was computed
// wrongly (no clamping), and evaluate() checks the bin count first, so both
// are bugs in the caller.
PitHistogram pit_histogram(std::span<const double> pit_values, uint32_t bins = 10);

// Needs each level in (0, 1) and PIT values as above; throws
// std::invalid_argument otherwise (callers check levels first).
std::vector<CoveragePoint> coverage_from_pit(std::span<const double> pit_values, std::span<const double> levels);

// inside[j] says whether pair j's rating fell in its level-L interval.
// Needs level in (0, 1); throws std::invalid_argument otherwise.
CoveragePoint coverage_from_membership(double level, const std::vector<bool>& inside);

// snake_case JSON; NaN figures are written as null.
nlohmann::json to_json(const PitHistogram& histogram);
nlohmann::json to_json(const std::vector<CoveragePoint>& curve);

}  // namespace credence
