// Offline evaluation (model/assess/evaluate.hpp). Each pair's results go into its
// own slot of per-pair arrays inside the parallel loop; the sums are taken
// afterwards in test-set order, so the report is identical for any thread
// count.
#include "model/assess/evaluate.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <optional>

#include "model/data/product_means.hpp"
#include "model/error.hpp"
#include "model/math/random.hpp"
#include "model/math/standard_normal.hpp"

namespace credence {

namespace {

std::string level_key(double level) { return fmt::format("{}", level); }

// The options come from the command line (evaluate, report): --k and
// --relevance-threshold are named where they can be at fault.
void check_options(const EvaluationOptions& options) {
    auto check_level = [](double level, const char* what) {
        if (!(level > 0.0 && level < 1.0))
            throw OptionError(fmt::format("evaluate: {} must be strictly between 0 and 1, got {}", what, level));
    };
    for (double level : options.coverage_levels) check_level(level, "coverage level");
    for (double level : options.curve_levels) check_level(level, "coverage curve level");
    if (options.pit_bins == 0) throw OptionError("evaluate: the PIT histogram needs at least 1 bin");
    if (options.ranking) {
        if (options.ranking_k == 0) throw OptionError("evaluate: --k (the ranking list length) must be at least 1");
        if (!std::isfinite(options.relevance_threshold))
            throw OptionError(fmt::format("evaluate: --relevance-threshold must be a finite rating value, got {}",
                                          options.relevance_threshold));
        check_level(options.ranking_level, "ranking interval level");
    }
}

const char* mode_name(RankBy mode) {
    switch (mode) {
        case RankBy::mean: return "mean";
        case RankBy::lower: return "lower";
        case RankBy::upper: return "upper";
        case RankBy::draw: return "draw";
    }
    return "?";
}

// Top-k lists of every user with held-out ratings, for each rank_by mode.
std::vector<RankingByMode> rank_users(const PredictionEngine& engine, const std::vector<uint32_t>& users,
                                      const std::vector<HeldOutRatings>& held_out, const EvaluationOptions& options) {
    std::vector<RankingByMode> out;
    if (users.empty()) return out;
    for (RankBy mode : {RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}) {
        std::vector<std::vector<uint32_t>> ranked(users.size());
#pragma omp parallel for schedule(dynamic, 4)
        for (size_t j = 0; j < users.size(); ++j) {
            RecommendOptions ro;
            ro.n = options.ranking_k;
            ro.rank_by = mode;
            ro.level = options.ranking_level;
            ro.exclude_rated = true;
            // A different posterior sample per user, as separate requests would get.
            ro.draw_seed = Rng::keyed(options.draw_seed, 0, 0, StreamBlock::serve, users[j]).next_u64();
            for (const Recommendation& r : engine.recommend(users[j], ro)) ranked[j].push_back(r.item);
        }
        out.push_back({mode_name(mode), ranking_metrics(ranked, held_out, engine.posterior().num_items,
                                                        options.ranking_k, options.relevance_threshold,
                                                        GainKind::graded)});
    }
    return out;
}

// Test-set id -> posterior index, resolved once per distinct id.
std::vector<std::optional<uint32_t>> translate(const IdMap& from, const IdMap& to) {
    std::vector<std::optional<uint32_t>> out(from.size());
    for (uint32_t i = 0; i < from.size(); ++i) out[i] = to.find(from.name(i));
    return out;
}

enum PairStatus : uint8_t { rated, unknown_user, unknown_item };

// Per-pair results of the parallel pass, each in its own slot.
struct PairScores {
    std::vector<uint8_t> status;     // PairStatus
    std::vector<double> abs_error;   // |clipped mean - rating|
    std::vector<double> log_density;
    std::vector<double> pit;
    std::vector<uint8_t> inside;     // [pair][coverage level]: rating inside the clipped interval
};

// Scores every test pair whose user and item the model knows. Parallel over
// pairs; each pair writes only its own slots.
PairScores score_pairs(const PredictionEngine& engine, const RatingSet& test, const EvaluationOptions& options,
                       const std::vector<std::optional<uint32_t>>& user_of,
                       const std::vector<std::optional<uint32_t>>& item_of) {
    const Posterior& p = engine.posterior();
    const size_t N = test.ratings.size(), L = options.coverage_levels.size();
    PairScores out;
    out.status.resize(N);
    out.abs_error.assign(N, 0.0);
    out.log_density.assign(N, 0.0);
    out.pit.assign(N, 0.0);
    out.inside.assign(N * L, 0);
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
                out.status[k] = unknown_user;
                continue;
            }
            if (!i) {
                out.status[k] = unknown_item;
                continue;
            }
            out.status[k] = rated;
            engine.sample_means(*u, *i, m);
            const double x = r.value;
            out.abs_error[k] = std::abs(std::clamp(mixture_mean(m), lo_scale, hi_scale) - x);
            out.log_density[k] = mixture_log_density(m, tau, x);
            out.pit[k] = mixture_cdf(m, tau, x);
            for (size_t l = 0; l < L; ++l) {
                const double level = options.coverage_levels[l];
                const double lower = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 - level)), lo_scale, hi_scale);
                const double upper = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 + level)), lo_scale, hi_scale);
                out.inside[k * L + l] = lower <= x && x <= upper;
            }
        }
    }
    return out;
}

bool trained_on(const Posterior& p, uint32_t u, uint32_t i) {
    const auto rated = p.rated_by(u);
    return std::binary_search(rated.begin(), rated.end(), i);
}

// The stored product-mean baseline on the rated pairs of `test`.
BaselineFigures score_baseline(const Posterior& p, const RatingSet& test, const EvaluationOptions& options,
                               const std::vector<std::optional<uint32_t>>& user_of,
                               const std::vector<std::optional<uint32_t>>& item_of) {
    BaselineFigures out;
    const auto meta = nlohmann::json::parse(p.fit_metadata_json, nullptr, false);
    if (meta.is_discarded() || !meta.is_object() || !meta.contains("baseline")) return out;
    const auto b = baseline_from_json(meta["baseline"], p.num_items);
    if (!b) return out;
    out.available = true;
    const double lo = p.scale.min, hi = p.scale.max, sd = b->residual_sd;
    double sq = 0.0, abs = 0.0, lpd = 0.0, n = 0.0;
    std::vector<double> inside(options.coverage_levels.size(), 0.0);
    for (const Rating& r : test.ratings) {
        if (!user_of[r.user] || !item_of[r.item]) continue;
        const double mean = b->item_mean[*item_of[r.item]], x = r.value;
        const double e = std::clamp(mean, lo, hi) - x;
        sq += e * e;
        abs += std::abs(e);
        const double z = (x - mean) / sd;
        lpd += -0.5 * z * z - std::log(sd) - 0.5 * std::log(2.0 * 3.14159265358979323846);
        for (size_t l = 0; l < inside.size(); ++l) {
            const double half = sd * normal_quantile(0.5 * (1.0 + options.coverage_levels[l]));
            inside[l] += std::clamp(mean - half, lo, hi) <= x && x <= std::clamp(mean + half, lo, hi);
        }
        ++n;
    }
    const double nan = std::numeric_limits<double>::quiet_NaN();
    out.rmse = n > 0 ? std::sqrt(sq / n) : nan;
    out.mae = n > 0 ? abs / n : nan;
    out.mean_log_predictive_density = n > 0 ? lpd / n : nan;
    for (size_t l = 0; l < inside.size(); ++l)
        out.coverage[level_key(options.coverage_levels[l])] = n > 0 ? inside[l] / n : nan;
    return out;
}

// What a reader of the figures must know: pairs the model was trained on,
// and a file most of whose ratings could not be scored.
std::vector<std::string> honesty_warnings(const EvaluationReport& r, size_t rows) {
    std::vector<std::string> out;
    if (r.in_training > 0)
        out.push_back(fmt::format("{} of the {} scored ratings ({:.1f}%) are (customer, product) pairs the model was "
                                  "trained on; their figures flatter it: score ratings it has not seen (fit "
                                  "--holdout-out writes the held-out ones)",
                                  r.in_training, r.rated, 100.0 * double(r.in_training) / double(r.rated)));
    if (rows > 0 && 2 * r.rated < rows)
        out.push_back(fmt::format("only {} of the {} ratings could be scored ({} with a customer and {} with a product "
                                  "the model does not know); the figures describe a small part of the file",
                                  r.rated, rows, r.unknown_users, r.unknown_items));
    return out;
}

}  // namespace

std::vector<double> EvaluationOptions::default_curve_levels() {
    std::vector<double> levels;
    for (int percent = 10; percent <= 95; percent += 5) levels.push_back(percent / 100.0);
    return levels;
}

EvaluationReport evaluate(const PredictionEngine& engine, const RatingSet& test, const EvaluationOptions& options) {
    check_options(options);
    const Posterior& p = engine.posterior();
    // A threshold outside the scale makes every rating relevant, or none:
    // the ranking figures would be 1 or NaN and mean nothing.
    if (options.ranking && !(options.relevance_threshold > p.scale.min && options.relevance_threshold <= p.scale.max))
        throw OptionError(fmt::format("--relevance-threshold {:g} is outside the model's rating scale ({:g}, {:g}], so "
                                      "{} rating could count as relevant; give a rating value that means liked, such "
                                      "as 4 on a 1 to 5 scale",
                                      options.relevance_threshold, p.scale.min, p.scale.max,
                                      options.relevance_threshold > p.scale.max ? "no" : "every"));
    const auto user_of = translate(test.users, IdMap::from_names(p.user_ids));
    const auto item_of = translate(test.items, IdMap::from_names(p.item_ids));
    const PairScores scores = score_pairs(engine, test, options, user_of, item_of);
    const auto& [status, abs_error, log_density, pit, inside] = scores;
    const size_t N = test.ratings.size(), L = options.coverage_levels.size();

    // Sums in test-set order, so the report does not depend on the thread count.
    EvaluationReport report;
    std::map<uint32_t, HeldOutRatings> held_out_by_user;  // posterior user -> held-out ratings
    double sq = 0.0, abs = 0.0, lpd = 0.0;
    uint64_t off_scale = 0;  // rated pairs whose rating lies outside the model's scale
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
        report.in_training += trained_on(p, *user_of[test.ratings[k].user], *item_of[test.ratings[k].item]);
        off_scale += test.ratings[k].value < p.scale.min || test.ratings[k].value > p.scale.max;
        sq += abs_error[k] * abs_error[k];
        abs += abs_error[k];
        lpd += log_density[k];
        report.pit.push_back(pit[k]);
        if (options.ranking) {
            const Rating& r = test.ratings[k];
            held_out_by_user[*user_of[r.user]][*item_of[r.item]] = r.value;
        }
        for (size_t l = 0; l < L; ++l) covered[l] += inside[k * L + l];
    }
    const double n = static_cast<double>(report.rated);
    const double nan = std::numeric_limits<double>::quiet_NaN();
    report.rmse = report.rated ? std::sqrt(sq / n) : nan;
    report.mae = report.rated ? abs / n : nan;
    report.mean_log_predictive_density = report.rated ? lpd / n : nan;
    for (size_t l = 0; l < L; ++l)
        report.coverage[level_key(options.coverage_levels[l])] = report.rated ? covered[l] / n : nan;
    report.warnings = honesty_warnings(report, N);
    if (off_scale > 0)
        report.warnings.push_back(fmt::format(
            "{} of the {} scored ratings lie outside the model's rating scale [{:g}, {:g}], where its predictions and "
            "intervals are clipped, so they count as errors the model could not avoid; give evaluate the --scale the "
            "fit was given, or check the file is on the same scale",
            off_scale, report.rated, p.scale.min, p.scale.max));
    report.baseline = score_baseline(p, test, options, user_of, item_of);
    report.pit_histogram = pit_histogram(report.pit, options.pit_bins);
    report.coverage_curve = coverage_from_pit(report.pit, options.curve_levels);
    if (options.ranking) {
        std::vector<uint32_t> users;
        std::vector<HeldOutRatings> held_out;
        for (auto& [u, ratings] : held_out_by_user) {
            users.push_back(u);
            held_out.push_back(std::move(ratings));
        }
        report.ranking = rank_users(engine, users, held_out, options);
        report.ranking_k = options.ranking_k;
        report.relevance_threshold = options.relevance_threshold;
    }
    return report;
}

void require_scored(const EvaluationReport& report, const std::string& model_name, const std::string& ratings_name) {
    if (report.rated > 0) return;
    throw DataError(fmt::format("{}: none of the {} ratings could be scored ({} with a customer and {} with a product "
                                "that {} does not know); check that the file belongs to this model",
                                ratings_name, report.unknown_users + report.unknown_items, report.unknown_users,
                                report.unknown_items, model_name));
}

nlohmann::json to_json(const EvaluationReport& report) {
    auto number = [](double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); };
    nlohmann::json coverage = nlohmann::json::object();
    for (const auto& [level, share] : report.coverage) coverage[level] = number(share);
    nlohmann::json j = {{"rmse", number(report.rmse)},
                        {"mae", number(report.mae)},
                        {"mean_log_predictive_density", number(report.mean_log_predictive_density)},
                        {"coverage", coverage},
                        {"rated", report.rated},
                        {"unknown_users", report.unknown_users},
                        {"unknown_items", report.unknown_items},
                        {"in_training", report.in_training},
                        {"warnings", report.warnings},
                        {"pit_histogram", to_json(report.pit_histogram)},
                        {"coverage_curve", to_json(report.coverage_curve)}};
    {
        nlohmann::json base_coverage = nlohmann::json::object();
        for (const auto& [level, share] : report.baseline.coverage) base_coverage[level] = number(share);
        j["baseline"] = report.baseline.available
                            ? nlohmann::json{{"available", true},
                                             {"kind", "product_mean"},
                                             {"rmse", number(report.baseline.rmse)},
                                             {"mae", number(report.baseline.mae)},
                                             {"mean_log_predictive_density",
                                              number(report.baseline.mean_log_predictive_density)},
                                             {"coverage", base_coverage}}
                            : nlohmann::json{{"available", false}};
    }
    if (!report.ranking.empty()) {
        nlohmann::json modes = nlohmann::json::object();
        for (const auto& [mode, m] : report.ranking)
            modes[mode] = {{"precision_at_k", number(m.precision_at_k)},
                           {"recall_at_k", number(m.recall_at_k)},
                           {"ndcg_at_k", number(m.ndcg_at_k)},
                           {"catalogue_coverage", number(m.catalogue_coverage)},
                           {"users_evaluated", m.users_evaluated},
                           {"users_without_relevant", m.users_without_relevant},
                           {"distinct_items_recommended", m.distinct_items_recommended}};
        j["ranking"] = {{"k", report.ranking_k},
                        {"relevance_threshold", report.relevance_threshold},
                        {"gain", "graded"},
                        {"candidates", "all items not rated in training"},
                        {"modes", modes}};
    }
    return j;
}

}  // namespace credence
