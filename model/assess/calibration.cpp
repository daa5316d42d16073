#include "model/assess/calibration.hpp"

#include <cmath>
#include <limits>
#include <stdexcept>
#include <string>

#include <fmt/format.h>

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

void check_pit(std::span<const double> pit_values) {
    for (size_t j = 0; j < pit_values.size(); ++j) {
        const double v = pit_values[j];
        if (!(v >= 0.0 && v <= 1.0))
            throw std::invalid_argument(fmt::format("calibration: PIT value {} of pair {} is not a probability in [0, 1]; "
                                        "the predictive CDF was evaluated wrongly", v, j));
    }
}

void check_level(double level) {
    if (!(level > 0.0 && level < 1.0))
        throw std::invalid_argument(fmt::format("calibration: interval level {} must lie strictly between 0 and 1", level));
}

CoveragePoint make_point(double level, uint64_t inside, uint64_t total) {
    CoveragePoint p;
    p.level = level;
    p.inside = inside;
    p.total = total;
    const double n = static_cast<double>(total);
    p.coverage = total ? static_cast<double>(inside) / n : kNaN;
    p.standard_error = total ? std::sqrt(level * (1.0 - level) / n) : kNaN;
    return p;
}

nlohmann::json finite_or_null(double x) {
    return std::isfinite(x) ? nlohmann::json(x) : nlohmann::json(nullptr);
}

}  // namespace

std::vector<double> default_coverage_levels() {
    std::vector<double> levels;
    for (int percent = 10; percent <= 95; percent += 5) levels.push_back(percent / 100.0);
    levels.push_back(0.99);
    return levels;
}

PitHistogram pit_histogram(std::span<const double> pit_values, uint32_t bins) {
    if (bins == 0) throw std::invalid_argument("calibration: a PIT histogram needs at least one bin");
    check_pit(pit_values);
    PitHistogram h;
    h.counts.assign(bins, 0);
    h.total = pit_values.size();
    h.degrees_of_freedom = bins - 1;
    for (double v : pit_values) {
        const auto b = static_cast<uint32_t>(v * bins);
        ++h.counts[b < bins ? b : bins - 1];  // PIT = 1 belongs to the last, closed bin
    }
    if (h.total == 0) {
        h.chi_square = kNaN;
        return h;
    }
    const double expected = static_cast<double>(h.total) / bins;
    for (uint64_t c : h.counts) h.chi_square += (static_cast<double>(c) - expected) * (static_cast<double>(c) - expected) / expected;
    return h;
}

std::vector<CoveragePoint> coverage_from_pit(std::span<const double> pit_values, std::span<const double> levels) {
    check_pit(pit_values);
    std::vector<CoveragePoint> curve;
    for (double level : levels) {
        check_level(level);
        const double lo = 0.5 * (1.0 - level), hi = 0.5 * (1.0 + level);
        uint64_t inside = 0;
        for (double v : pit_values) inside += (v >= lo && v <= hi) ? 1 : 0;
        curve.push_back(make_point(level, inside, pit_values.size()));
    }
    return curve;
}

CoveragePoint coverage_from_membership(double level, const std::vector<bool>& inside) {
    check_level(level);
    uint64_t count = 0;
    for (bool b : inside) count += b ? 1 : 0;
    return make_point(level, count, inside.size());
}

nlohmann::json to_json(const PitHistogram& histogram) {
    return {{"counts", histogram.counts},
            {"total", histogram.total},
            {"chi_square", finite_or_null(histogram.chi_square)},
            {"degrees_of_freedom", histogram.degrees_of_freedom}};
}

nlohmann::json to_json(const std::vector<CoveragePoint>& curve) {
    nlohmann::json out = nlohmann::json::array();
    for (const auto& p : curve)
        out.push_back({{"level", p.level},
                       {"inside", p.inside},
                       {"total", p.total},
                       {"coverage", finite_or_null(p.coverage)},
                       {"standard_error", finite_or_null(p.standard_error)}});
    return out;
}

}  // namespace credence
