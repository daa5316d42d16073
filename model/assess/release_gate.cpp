#include "model/assess/release_gate.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <memory>
#include <optional>

#include <fmt/format.h>

#include "model/predict/mixture.hpp"
#include "model/predict/predict.hpp"

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

std::vector<std::optional<uint32_t>> translate(const IdMap& from, const std::vector<std::string>& to_names) {
    const IdMap to = IdMap::from_names(to_names);
    std::vector<std::optional<uint32_t>> out(from.size());
    for (uint32_t i = 0; i < from.size(); ++i) out[i] = to.find(from.name(i));
    return out;
}

bool trained_on(const Posterior& p, uint32_t u, uint32_t i) {
    const auto rated = p.rated_by(u);
    return std::binary_search(rated.begin(), rated.end(), i);
}

struct Side {
    std::shared_ptr<const Posterior> posterior;
    std::vector<std::optional<uint32_t>> user_of, item_of;
};

double mean_of(const std::vector<double>& v) {
    double s = 0.0;
    for (double x : v) s += x;
    return v.empty() ? kNaN : s / double(v.size());
}

double se_of(const std::vector<double>& v) {
    if (v.size() < 2) return kNaN;
    const double m = mean_of(v);
    double ss = 0.0;
    for (double x : v) ss += (x - m) * (x - m);
    return std::sqrt(ss / double(v.size() - 1)) / std::sqrt(double(v.size()));
}

nlohmann::json number(double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); }

}  // namespace

PairedAccuracy paired_accuracy(const Posterior& before, const Posterior& after, const RatingSet& test) {
    // The engines need shared ownership; the posteriors outlive this call.
    const auto keep = [](const Posterior& p) { return std::shared_ptr<const Posterior>(&p, [](const Posterior*) {}); };
    const Side sides[2] = {{keep(before), translate(test.users, before.user_ids), translate(test.items, before.item_ids)},
                           {keep(after), translate(test.users, after.user_ids), translate(test.items, after.item_ids)}};
    const PredictionEngine engines[2] = {PredictionEngine(sides[0].posterior), PredictionEngine(sides[1].posterior)};
    const size_t n = test.ratings.size();
    enum : uint8_t { compared, unknown, trained };
    std::vector<uint8_t> status(n);
    std::vector<double> lpd[2], se[2];
    for (int s = 0; s < 2; ++s) {
        lpd[s].assign(n, 0.0);
        se[s].assign(n, 0.0);
    }
#pragma omp parallel
    {
        std::vector<double> m;
#pragma omp for schedule(dynamic, 64)
        for (size_t k = 0; k < n; ++k) {
            const Rating& r = test.ratings[k];
            status[k] = compared;
            for (int s = 0; s < 2 && status[k] == compared; ++s) {
                const auto u = sides[s].user_of[r.user], i = sides[s].item_of[r.item];
                if (!u || !i) status[k] = unknown;
                else if (trained_on(*sides[s].posterior, *u, *i)) status[k] = trained;
            }
            if (status[k] != compared) continue;
            for (int s = 0; s < 2; ++s) {
                const Posterior& p = *sides[s].posterior;
                engines[s].sample_means(*sides[s].user_of[r.user], *sides[s].item_of[r.item], m);
                const std::span<const float> tau(p.noise_precision);
                lpd[s][k] = mixture_log_density(m, tau, r.value);
                const double e = std::clamp(mixture_mean(m), double(p.scale.min), double(p.scale.max)) - r.value;
                se[s][k] = e * e;
            }
        }
    }
    PairedAccuracy a;
    a.ratings = n;
    std::vector<double> l[2], q[2], dl, dq;
    for (size_t k = 0; k < n; ++k) {  // in test order: the sums do not depend on the thread count
        if (status[k] == unknown) ++a.unknown;
        if (status[k] == trained) ++a.trained;
        if (status[k] != compared) continue;
        ++a.compared;
        for (int s = 0; s < 2; ++s) {
            l[s].push_back(lpd[s][k]);
            q[s].push_back(se[s][k]);
        }
        dl.push_back(lpd[1][k] - lpd[0][k]);
        dq.push_back(se[1][k] - se[0][k]);
    }
    a.before_log_density = mean_of(l[0]);
    a.after_log_density = mean_of(l[1]);
    a.before_rmse = std::sqrt(mean_of(q[0]));
    a.after_rmse = std::sqrt(mean_of(q[1]));
    a.log_density_difference = mean_of(dl);
    a.log_density_difference_se = se_of(dl);
    a.squared_error_difference = mean_of(dq);
    a.squared_error_difference_se = se_of(dq);
    return a;
}

nlohmann::json to_json(const PairedAccuracy& a) {
    return {{"ratings", a.ratings},
            {"compared", a.compared},
            {"skipped_unknown_ids", a.unknown},
            {"skipped_in_training", a.trained},
            {"before", {{"mean_log_predictive_density", number(a.before_log_density)}, {"rmse", number(a.before_rmse)}}},
            {"after", {{"mean_log_predictive_density", number(a.after_log_density)}, {"rmse", number(a.after_rmse)}}},
            {"log_density_difference", number(a.log_density_difference)},
            {"log_density_difference_se", number(a.log_density_difference_se)},
            {"squared_error_difference", number(a.squared_error_difference)},
            {"squared_error_difference_se", number(a.squared_error_difference_se)}};
}

GateDecision judge_release(const PairedAccuracy* accuracy, const std::vector<std::string>& verdicts) {
    GateDecision d;
    for (const std::string& v : verdicts)
        if (v != "converged") d.reasons.push_back(fmt::format("the new model did not converge (verdict {})", v));
    if (!accuracy) {
        d.notes.push_back("no live model to compare with: only convergence was checked");
    } else if (accuracy->compared < 2 || !std::isfinite(accuracy->log_density_difference_se)) {
        d.notes.push_back(fmt::format("only {} held-out ratings are known to both models and unseen by both ({} have "
                                      "an id one model lacks, {} were trained on): accuracy was not compared",
                                      accuracy->compared, accuracy->unknown, accuracy->trained));
    } else if (accuracy->log_density_difference < -kGateStandardErrors * accuracy->log_density_difference_se) {
        d.reasons.push_back(fmt::format(
            "on {} held-out ratings the new model's mean log predictive density is {:.4f} below the live model's "
            "({:.4f} against {:.4f}), more than {:g} standard errors of the paired difference (SE {:.4f})",
            accuracy->compared, -accuracy->log_density_difference, accuracy->after_log_density,
            accuracy->before_log_density, kGateStandardErrors, accuracy->log_density_difference_se));
    }
    d.pass = d.reasons.empty();
    d.record = {{"passed", d.pass},
                {"rule", fmt::format("refuse when not converged, or when the held-out mean log predictive density "
                                     "is worse than the live model's by more than {:g} paired standard errors",
                                     kGateStandardErrors)},
                {"reasons", d.reasons},
                {"notes", d.notes},
                {"verdicts", verdicts},
                {"accuracy", accuracy ? to_json(*accuracy) : nlohmann::json(nullptr)}};
    return d;
}

}  // namespace credence
