// Model comparison (model/assess/compare.hpp). Per-rating figures go into their own
// slots inside parallel loops and are summed afterwards in a fixed order, so
// the result does not depend on the thread count.
#include "model/assess/compare.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <limits>
#include <memory>
#include <numeric>
#include <set>

#include "model/error.hpp"
#include "model/predict/predict.hpp"
#include "model/math/random.hpp"

namespace credence {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

struct Split {
    RatingSet train;
    std::vector<Rating> test;
};

// Which split holds each rating out: a seeded Fisher-Yates permutation; the
// holdout takes its first round(fraction N) entries, K-fold deals it round robin.
std::vector<Split> make_splits(const RatingSet& all, const CompareOptions& o) {
    const size_t N = all.size();
    std::vector<size_t> order(N);
    std::iota(order.begin(), order.end(), size_t{0});
    Rng rng = Rng::keyed(o.split_seed, 0, 0, StreamBlock::split, 1);
    for (size_t j = N; j > 1; --j) std::swap(order[j - 1], order[rng.below(j)]);

    const uint32_t K = o.folds < 2 ? 1 : o.folds;
    std::vector<uint32_t> fold_of(N, K);  // K: never held out
    if (K == 1) {
        const auto n_test = static_cast<size_t>(std::llround(o.holdout_fraction * static_cast<double>(N)));
        for (size_t j = 0; j < n_test; ++j) fold_of[order[j]] = 0;
    } else {
        for (size_t j = 0; j < N; ++j) fold_of[order[j]] = static_cast<uint32_t>(j % K);
    }
    std::vector<Split> splits(K);
    for (uint32_t k = 0; k < K; ++k) {
        Split& s = splits[k];
        s.train.users = all.users;
        s.train.items = all.items;
        s.train.scale = all.scale;
        for (size_t j = 0; j < N; ++j) {  // original order: train stays sorted by (user, item)
            if (fold_of[j] == k) s.test.push_back(all.ratings[j]);
            else s.train.ratings.push_back(all.ratings[j]);
        }
        if (s.test.empty() || s.train.ratings.empty())
            throw DataError(fmt::format(
                "compare: split {} of {} has {} training and {} held-out ratings; both must be non-empty "
                "(use more ratings, fewer --folds or another --holdout fraction)",
                k + 1, K, s.train.size(), s.test.size()));
    }
    return splits;
}

double mean_of(const std::vector<double>& v) {
    return v.empty() ? kNaN : std::accumulate(v.begin(), v.end(), 0.0) / static_cast<double>(v.size());
}

double sd_of(const std::vector<double>& v) {  // sample sd (n - 1)
    if (v.size() < 2) return kNaN;
    const double m = mean_of(v);
    double ss = 0.0;
    for (double x : v) ss += (x - m) * (x - m);
    return std::sqrt(ss / static_cast<double>(v.size() - 1));
}

double se_of(const std::vector<double>& v) { return sd_of(v) / std::sqrt(static_cast<double>(v.size())); }

// Per held-out rating of one split: log density, squared error, inside.
struct SplitScore {
    std::vector<double> lpd, squared_error, inside;
    double waic_elpd_per_rating = 0.0, waic_se_per_rating = 0.0, p_waic = 0.0;
    uint64_t waic_high_variance = 0;
    uint64_t waic_ratings = 0;
    double seconds = 0.0;
};

void score_held_out(const PredictionEngine& engine, const std::vector<Rating>& test, double level, SplitScore& out) {
    const Posterior& p = engine.posterior();
    const std::span<const float> tau(p.noise_precision);
    const double lo = p.scale.min, hi = p.scale.max;
    const size_t N = test.size();
    out.lpd.assign(N, 0.0);
    out.squared_error.assign(N, 0.0);
    out.inside.assign(N, 0.0);
#pragma omp parallel
    {
        std::vector<double> m;
#pragma omp for schedule(dynamic, 64)
        for (size_t k = 0; k < N; ++k) {
            const Rating& r = test[k];
            engine.sample_means(r.user, r.item, m);
            const double x = r.value;
            const double e = std::clamp(mixture_mean(m), lo, hi) - x;
            out.squared_error[k] = e * e;
            out.lpd[k] = mixture_log_density(m, tau, x);
            const double lower = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 - level)), lo, hi);
            const double upper = std::clamp(mixture_quantile(m, tau, 0.5 * (1.0 + level)), lo, hi);
            out.inside[k] = (lower <= x && x <= upper) ? 1.0 : 0.0;
        }
    }
}

void score_waic(const Posterior& p, const RatingSet& train, SplitScore& out) {
    const size_t N = train.size(), S = p.num_samples;
    std::vector<double> elpd(N), p_i(N);
#pragma omp parallel
    {
        std::vector<double> ll(S);
#pragma omp for schedule(static)
        for (size_t k = 0; k < N; ++k) {
            const Rating& r = train.ratings[k];
            double top = -std::numeric_limits<double>::infinity(), mean_ll = 0.0;
            for (size_t s = 0; s < S; ++s) {
                const double tau = p.noise_precision[s];
                const double d = r.value - static_cast<double>(p.sample_prediction(static_cast<uint32_t>(s), r.user, r.item));
                ll[s] = 0.5 * std::log(tau / (2.0 * 3.14159265358979323846)) - 0.5 * tau * d * d;
                top = std::max(top, ll[s]);
                mean_ll += ll[s];
            }
            mean_ll /= static_cast<double>(S);
            double sum_exp = 0.0, ss = 0.0;
            for (size_t s = 0; s < S; ++s) {
                sum_exp += std::exp(ll[s] - top);
                ss += (ll[s] - mean_ll) * (ll[s] - mean_ll);
            }
            const double lppd = top + std::log(sum_exp / static_cast<double>(S));
            p_i[k] = S > 1 ? ss / static_cast<double>(S - 1) : 0.0;
            elpd[k] = lppd - p_i[k];
        }
    }
    const double n = static_cast<double>(N);
    double total = 0.0, p_total = 0.0;
    for (size_t k = 0; k < N; ++k) {
        total += elpd[k];
        p_total += p_i[k];
        out.waic_high_variance += p_i[k] > 0.4;
    }
    out.waic_ratings = N;
    out.waic_elpd_per_rating = total / n;
    out.waic_se_per_rating = std::sqrt(n) * sd_of(elpd) / n;
    out.p_waic = p_total;
}

// A figure and its SE from per-split per-rating values (see the header).
struct Figure {
    double value = kNaN, se = kNaN;
};

Figure mean_figure(const std::vector<SplitScore>& splits, std::vector<double> SplitScore::*field) {
    if (splits.size() == 1) return {mean_of(splits[0].*field), se_of(splits[0].*field)};
    std::vector<double> per_fold;
    for (const auto& s : splits) per_fold.push_back(mean_of(s.*field));
    return {mean_of(per_fold), se_of(per_fold)};
}

Figure rmse_figure(const std::vector<SplitScore>& splits) {
    if (splits.size() == 1) {
        const double mse = mean_of(splits[0].squared_error);
        const double rmse = std::sqrt(mse);
        return {rmse, se_of(splits[0].squared_error) / (2.0 * rmse)};
    }
    std::vector<double> per_fold;
    for (const auto& s : splits) per_fold.push_back(std::sqrt(mean_of(s.squared_error)));
    return {mean_of(per_fold), se_of(per_fold)};
}

// Paired SE of mlpd(a) - mlpd(b).
double difference_se(const std::vector<SplitScore>& a, const std::vector<SplitScore>& b) {
    std::vector<double> d;
    if (a.size() == 1) {
        for (size_t k = 0; k < a[0].lpd.size(); ++k) d.push_back(a[0].lpd[k] - b[0].lpd[k]);
    } else {
        for (size_t f = 0; f < a.size(); ++f) d.push_back(mean_of(a[f].lpd) - mean_of(b[f].lpd));
    }
    return se_of(d);
}

nlohmann::json number(double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); }

// The options come from the command line (credence compare); the flags are
// named. Checked before any fit so a typo costs nothing.
void check_options(const RatingSet& ratings, const CompareOptions& options) {
    if (options.ranks.empty()) throw OptionError("compare: --ranks must list at least one rank");
    std::set<uint32_t> seen;
    for (uint32_t r : options.ranks) {
        if (r == 0) throw OptionError("compare: --ranks must all be at least 1");
        if (!seen.insert(r).second) throw OptionError(fmt::format("compare: rank {} is listed twice in --ranks", r));
    }
    if (!(options.coverage_level > 0.0 && options.coverage_level < 1.0))
        throw OptionError(fmt::format("compare: coverage level {} must be strictly between 0 and 1",
                                      options.coverage_level));
    if (options.folds < 2 && !(options.holdout_fraction > 0.0 && options.holdout_fraction < 1.0))
        throw OptionError(fmt::format("compare: --holdout {} must be strictly between 0 and 1 (or give --folds 2 or more)",
                                      options.holdout_fraction));
    if (options.folds > ratings.size())
        throw DataError(fmt::format("compare: --folds {} but only {} ratings; give fewer folds or more ratings",
                                    options.folds, ratings.size()));
}

}  // namespace

ComparisonResult compare_models(const RatingSet& ratings, const CompareOptions& options,
                                const std::function<void(const std::string&)>& log) {
    check_options(ratings, options);
    const std::vector<Split> splits = make_splits(ratings, options);
    std::vector<uint32_t> ranks(options.ranks);
    std::sort(ranks.begin(), ranks.end());
    std::vector<bool> bias_settings = options.both_bias_settings ? std::vector<bool>{false, true}
                                                                 : std::vector<bool>{options.fit.biases};

    ComparisonResult result;
    result.folds = static_cast<uint32_t>(splits.size());
    result.holdout_fraction = splits.size() == 1 ? options.holdout_fraction : 0.0;
    result.coverage_level = options.coverage_level;
    std::vector<std::vector<SplitScore>> scores;
    const uint64_t rows = static_cast<uint64_t>(ratings.users.size()) + ratings.items.size();
    for (uint32_t rank : ranks) {
        for (bool biases : bias_settings) {
            ConfigScore c;
            c.rank = rank;
            c.biases = biases;
            c.parameters = rows * (rank + (biases ? 1 : 0));
            std::vector<SplitScore> per_split(splits.size());
            for (size_t f = 0; f < splits.size(); ++f) {
                FitOptions fo = options.fit;
                fo.rank = rank;
                fo.biases = biases;
                FitResult fit = fit_bpmf(splits[f].train, fo);
                per_split[f].seconds = fit.seconds;
                auto posterior = std::make_shared<const Posterior>(std::move(fit.posterior));
                score_held_out(PredictionEngine(posterior), splits[f].test, options.coverage_level, per_split[f]);
                score_waic(*posterior, splits[f].train, per_split[f]);
                if (log)
                    log(fmt::format("rank {:>3} biases {:<3} split {}/{}: held-out mean log density {:.4f} ({:.1f} s)",
                                    rank, biases ? "on" : "off", f + 1, splits.size(), mean_of(per_split[f].lpd),
                                    fit.seconds));
            }
            const Figure lpd = mean_figure(per_split, &SplitScore::lpd);
            const Figure rmse = rmse_figure(per_split);
            const Figure coverage = mean_figure(per_split, &SplitScore::inside);
            c.mean_log_predictive_density = lpd.value;
            c.mean_log_predictive_density_se = lpd.se;
            c.rmse = rmse.value;
            c.rmse_se = rmse.se;
            c.coverage = coverage.value;
            c.coverage_se = coverage.se;
            for (const SplitScore& s : per_split) {
                const double K = static_cast<double>(per_split.size());
                c.waic_elpd_per_rating += s.waic_elpd_per_rating / K;
                c.waic_se_per_rating += s.waic_se_per_rating / K;
                c.p_waic += s.p_waic / K;
                c.waic_high_variance_ratings += s.waic_high_variance;
                c.waic_training_ratings += s.waic_ratings;
                c.held_out_ratings += s.lpd.size();
                c.fit_seconds += s.seconds;
            }
            result.configs.push_back(c);
            scores.push_back(std::move(per_split));
        }
    }

    for (size_t c = 1; c < result.configs.size(); ++c)
        if (result.configs[c].mean_log_predictive_density > result.configs[result.best].mean_log_predictive_density)
            result.best = c;
    const ConfigScore& best = result.configs[result.best];
    result.recommended = result.best;
    for (size_t c = 0; c < result.configs.size(); ++c) {
        ConfigScore& x = result.configs[c];
        x.difference_to_best = x.mean_log_predictive_density - best.mean_log_predictive_density;
        x.difference_se = c == result.best ? 0.0 : difference_se(scores[c], scores[result.best]);
        const bool within = c == result.best || x.difference_to_best >= -x.difference_se;
        const ConfigScore& r = result.configs[result.recommended];
        const bool simpler = x.parameters < r.parameters || (x.parameters == r.parameters && x.rank < r.rank);
        if (within && simpler) result.recommended = c;
    }
    result.rule = "the model with the fewest parameters whose held-out mean log predictive density is within one "
                  "standard error (of the paired difference) of the best";
    const FitOptions& f = options.fit;
    result.settings = {{"ranks", ranks},
                       {"folds", result.folds},
                       {"holdout_fraction", result.holdout_fraction},
                       {"both_bias_settings", options.both_bias_settings},
                       {"coverage_level", options.coverage_level},
                       {"split_seed", options.split_seed},
                       {"fit",
                        {{"run_length", f.run_length == RunLength::converged ? "converged" : "fixed"},
                         {"burn_in", f.burn_in},
                         {"samples", f.samples},
                         {"thin", f.thin},
                         {"max_sweeps", f.max_sweeps},
                         {"chains", f.chains},
                         {"seed", f.seed},
                         {"biases", f.biases},
                         {"sample_noise", f.sample_noise}}}};
    return result;
}

nlohmann::json to_json(const ComparisonResult& result) {
    nlohmann::json configs = nlohmann::json::array();
    for (const ConfigScore& c : result.configs)
        configs.push_back({{"rank", c.rank},
                           {"biases", c.biases},
                           {"parameters", c.parameters},
                           {"mean_log_predictive_density", number(c.mean_log_predictive_density)},
                           {"mean_log_predictive_density_se", number(c.mean_log_predictive_density_se)},
                           {"rmse", number(c.rmse)},
                           {"rmse_se", number(c.rmse_se)},
                           {"coverage", number(c.coverage)},
                           {"coverage_se", number(c.coverage_se)},
                           {"difference_to_best", number(c.difference_to_best)},
                           {"difference_se", number(c.difference_se)},
                           {"waic",
                            {{"elpd_per_rating", number(c.waic_elpd_per_rating)},
                             {"se_per_rating", number(c.waic_se_per_rating)},
                             {"p_waic", number(c.p_waic)},
                             {"high_variance_ratings", c.waic_high_variance_ratings},
                             {"training_ratings", c.waic_training_ratings},
                             {"reliable", c.waic_reliable()}}},
                           {"held_out_ratings", c.held_out_ratings},
                           {"fit_seconds", c.fit_seconds}});
    return {{"folds", result.folds},
            {"holdout_fraction", result.holdout_fraction},
            {"coverage_level", result.coverage_level},
            {"best", result.best},
            {"recommended", result.recommended},
            {"rule", result.rule},
            {"configs", configs},
            {"settings", result.settings},
            {"data_fingerprint", result.data_fingerprint}};
}

ComparisonResult comparison_from_json(const nlohmann::json& j) {
    auto get = [](const nlohmann::json& o, const char* key) -> const nlohmann::json& {
        if (!o.is_object() || !o.contains(key))
            throw FormatError(fmt::format("comparison file: missing key \"{}\"; write it with credence compare --json", key));
        return o.at(key);
    };
    auto num = [&](const nlohmann::json& o, const char* key) {
        const auto& v = get(o, key);
        if (v.is_null()) return kNaN;
        if (!v.is_number()) throw FormatError(fmt::format("comparison file: \"{}\" is not a number", key));
        return v.get<double>();
    };
    ComparisonResult r;
    try {
        r.folds = get(j, "folds").get<uint32_t>();
        r.holdout_fraction = num(j, "holdout_fraction");
        r.coverage_level = num(j, "coverage_level");
        r.best = get(j, "best").get<size_t>();
        r.recommended = get(j, "recommended").get<size_t>();
        r.rule = get(j, "rule").get<std::string>();
        for (const auto& c : get(j, "configs")) {
            ConfigScore s;
            s.rank = get(c, "rank").get<uint32_t>();
            s.biases = get(c, "biases").get<bool>();
            s.parameters = get(c, "parameters").get<uint64_t>();
            s.mean_log_predictive_density = num(c, "mean_log_predictive_density");
            s.mean_log_predictive_density_se = num(c, "mean_log_predictive_density_se");
            s.rmse = num(c, "rmse");
            s.rmse_se = num(c, "rmse_se");
            s.coverage = num(c, "coverage");
            s.coverage_se = num(c, "coverage_se");
            s.difference_to_best = num(c, "difference_to_best");
            s.difference_se = num(c, "difference_se");
            const auto& w = get(c, "waic");
            s.waic_elpd_per_rating = num(w, "elpd_per_rating");
            s.waic_se_per_rating = num(w, "se_per_rating");
            s.p_waic = num(w, "p_waic");
            s.waic_high_variance_ratings = get(w, "high_variance_ratings").get<uint64_t>();
            s.waic_training_ratings = w.value("training_ratings", uint64_t{0});
            s.held_out_ratings = get(c, "held_out_ratings").get<uint64_t>();
            s.fit_seconds = num(c, "fit_seconds");
            r.configs.push_back(s);
        }
        r.settings = j.value("settings", nlohmann::json::object());
        r.data_fingerprint = j.value("data_fingerprint", std::string());
    } catch (const nlohmann::json::exception& e) {
        throw FormatError(std::string("comparison file: a key has the wrong type: ") + e.what());
    }
    if (r.configs.empty() || r.best >= r.configs.size() || r.recommended >= r.configs.size())
        throw FormatError("comparison file: \"best\" or \"recommended\" does not index a configuration");
    return r;
}

std::string format_table(const ComparisonResult& result) {
    std::string out = fmt::format("{:>5} {:>6} {:>10} {:>20} {:>18} {:>17} {:>18} {:>8}\n", "rank", "biases",
                                  "params", "held-out mlpd (SE)", "diff to best (SE)", "RMSE (SE)",
                                  fmt::format("{:.0f}% cover (SE)", 100 * result.coverage_level), "WAIC/n");
    for (size_t c = 0; c < result.configs.size(); ++c) {
        const ConfigScore& x = result.configs[c];
        std::string mark = c == result.recommended ? "  <- recommended" : "";
        if (c == result.best) mark += c == result.recommended ? ", best" : "  <- best";
        out += fmt::format("{:>5} {:>6} {:>10} {:>11.4f} ({:.4f}) {:>9.4f} ({:.4f}) {:>8.4f} ({:.4f}) {:>9.3f} ({:.3f}) {:>8.4f}{}{}\n",
                           x.rank, x.biases ? "on" : "off", x.parameters, x.mean_log_predictive_density,
                           x.mean_log_predictive_density_se, x.difference_to_best, x.difference_se, x.rmse, x.rmse_se,
                           x.coverage, x.coverage_se, x.waic_elpd_per_rating, x.waic_reliable() ? " " : "*", mark);
    }
    out += result.folds >= 2 ? fmt::format("{} folds; SEs across folds.\n", result.folds)
                             : fmt::format("one holdout of {:.0f}% of the ratings; SEs across held-out ratings.\n",
                                           100 * result.holdout_fraction);
    out += "Recommended: " + result.rule + ".\n";
    std::string unreliable;
    for (const ConfigScore& x : result.configs)
        if (!x.waic_reliable())
            unreliable += fmt::format("{}rank {} ({} of {} ratings)", unreliable.empty() ? "" : ", ", x.rank,
                                      x.waic_high_variance_ratings, x.waic_training_ratings);
    if (!unreliable.empty())
        out += "* WAIC is unreliable for " + unreliable +
               ": those training ratings have a log-likelihood variance over samples above 0.4 (Vehtari, Gelman & "
               "Gabry 2017); judge by the held-out log density, not by WAIC.\n";
    return out;
}

}  // namespace credence
