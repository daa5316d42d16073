// Offline evaluation (model/evaluate.hpp). Each pair's results go into its
// own slot of per-pair arrays inside the parallel loop; the sums are taken
// afterwards in test-set order, so the report is identical for any thread
// count.
#include "model/evaluate.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <optional>
#include <stdexcept>

namespace credence {

namespace {

std::string level_key(double level) { return fmt::format("{}", level); }

}  // namespace

EvaluationReport evaluate(const PredictionEngine& engine, const RatingSet& test, const EvaluationOptions& options) {
    for (double level : options.coverage_levels)
        if (!(level > 0.0 && level < 1.0))
            throw std::invalid_argument("coverage level must be strictly between 0 and 1, got " +
                                        std::to_string(level));
    const Posterior& p = engine.posterior();
    const IdMap users = IdMap::from_names(p.user_ids);
    const IdMap items = IdMap::from_names(p.item_ids);

    // Test-set id -> posterior index, resolved once per distinct id.
    auto translate = [](const IdMap& from, const IdMap& to) {
        std::vector<std::optional<uint32_t>> out(from.size());
        for (uint32_t i = 0; i < from.size(); ++i) out[i] = to.find(from.name(i));
        return out;
    };
    const auto user_of = translate(test.users, users);
    const auto item_of = translate(test.items, items);

    const size_t N = test.ratings.size(), L = options.coverage_levels.size();
    enum : uint8_t { rated, unknown_user, unknown_item };
    std::vector<uint8_t> status(N);
    std::vector<double> abs_error(N, 0.0), log_density(N, 0.0), pit(N, 0.0);
    std::vector<uint8_t> inside(N * L, 0);
    const std::span<const float> tau(p.noise_precision);
    const double lo_scale = p.scale.min, hi_scale = p.scale.max;

#pragma omp parallel
    {
        std::vector<double> m;
#pragma omp for schedule(dynamic, 64)
        for (size_t k = 0; k < N; ++k) {
            const Rating& r = test.ratings[k];
            const auto u = user_of[r.user];
            const auto i = item_of[r.item];
            if (!u) {
                status[k] = unknown_user;
                continue;
            }
            if (!i) {
                status[k] = unknown_item;
                continue;
            }
            status[k] = rated;
            engine.sample_means(*u, *i, m);
            const double x = r.value;
            abs_error[k] = std::abs(std::clamp(mixture_mean(m), lo_scale, hi_scale) - x);
            log_density[k] = mixture_log_density(m, tau, x);
            pit[k] = mixture_cdf(m, tau, x);
            for (size_t l = 0; l < L; ++l) {
                const double level = options.coverage_levels[l];
                const double lower = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 - level)), lo_scale, hi_scale);
                const double upper = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 + level)), lo_scale, hi_scale);
                inside[k * L + l] = lower <= x && x <= upper;
            }
        }
    }

    EvaluationReport report;
    double sq = 0.0, abs = 0.0, lpd = 0.0;
    std::vector<uint64_t> covered(L, 0);
    for (size_t k = 0; k < N; ++k) {
        if (status[k] == unknown_user) {
            ++report.unknown_users;
            continue;
        }
        if (status[k] == unknown_item) {
            ++report.unknown_items;
            continue;
        }
        ++report.rated;
        sq += abs_error[k] * abs_error[k];
        abs += abs_error[k];
        lpd += log_density[k];
        report.pit.push_back(pit[k]);
        for (size_t l = 0; l < L; ++l) covered[l] += inside[k * L + l];
    }
    const double n = static_cast<double>(report.rated);
    const double nan = std::numeric_limits<double>::quiet_NaN();
    report.rmse = report.rated ? std::sqrt(sq / n) : nan;
    report.mae = report.rated ? abs / n : nan;
    report.mean_log_predictive_density = report.rated ? lpd / n : nan;
    for (size_t l = 0; l < L; ++l)
        report.coverage[level_key(options.coverage_levels[l])] = report.rated ? covered[l] / n : nan;
    return report;
}

nlohmann::json to_json(const EvaluationReport& report) {
    auto number = [](double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); };
    nlohmann::json coverage = nlohmann::json::object();
    for (const auto& [level, share] : report.coverage) coverage[level] = number(share);
    return {{"rmse", number(report.rmse)},
            {"mae", number(report.mae)},
            {"mean_log_predictive_density", number(report.mean_log_predictive_density)},
            {"coverage", coverage},
            {"rated", report.rated},
            {"unknown_users", report.unknown_users},
            {"unknown_items", report.unknown_items}};
}

}  // namespace credence
