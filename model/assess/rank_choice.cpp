#include "model/assess/rank_choice.hpp"

#include <cmath>
#include <set>

#include <fmt/format.h>

#include "model/error.hpp"

namespace credence {

namespace {

nlohmann::json number(double v) { return std::isfinite(v) ? nlohmann::json(v) : nlohmann::json(nullptr); }

std::string join(const std::vector<uint32_t>& ranks) {
    std::string text;
    for (uint32_t r : ranks) text += (text.empty() ? "" : ", ") + std::to_string(r);
    return text;
}

}  // namespace

RankChoice choose_rank(const RatingSet& train, const FitOptions& fit, const RankChoiceOptions& options,
                       const std::function<void(const std::string&)>& log) {
    CompareOptions c;
    c.ranks = options.candidates;
    c.folds = 1;
    c.holdout_fraction = options.holdout_fraction;
    c.split_seed = fit.seed;
    const FitOptions short_run = c.fit;  // compare's fixed-length default
    c.fit = fit;
    c.fit.run_length = short_run.run_length;
    c.fit.burn_in = short_run.burn_in;
    c.fit.samples = short_run.samples;
    c.fit.thin = short_run.thin;

    // compare_models checks the fraction; the candidates are checked here so
    // the message names fit's flag, and so is the size (compare's split
    // rounds the same way).
    std::set<uint32_t> seen;
    for (uint32_t r : options.candidates)
        if (r == 0 || !seen.insert(r).second)
            throw OptionError(fmt::format("choosing the rank: rank {} is {} in --auto-ranks; list each rank of at "
                                          "least 1 once",
                                          r, r == 0 ? "not a rank" : "listed twice"));
    if (options.candidates.empty()) throw OptionError("choosing the rank: --auto-ranks lists no rank");
    if (options.holdout_fraction > 0.0 && options.holdout_fraction < 1.0) {
        const auto held_out =
            static_cast<uint64_t>(std::llround(options.holdout_fraction * static_cast<double>(train.size())));
        if (held_out < options.min_held_out_ratings)
            throw DataError(fmt::format(
                "choosing the rank from the data holds out {:.0f}% of the {} training ratings, {} ratings, fewer "
                "than the {} needed to tell ranks apart; give the rank with --rank K (for example --rank {})",
                100 * options.holdout_fraction, train.size(), held_out, options.min_held_out_ratings,
                options.candidates.empty() ? 4u : options.candidates.front()));
    }
    RankChoice choice;
    choice.comparison = compare_models(train, c, log);
    choice.rank = choice.comparison.configs[choice.comparison.recommended].rank;
    return choice;
}

nlohmann::json to_json(const RankChoice& choice) {
    const ComparisonResult& r = choice.comparison;
    nlohmann::json scores = nlohmann::json::array();
    std::vector<uint32_t> candidates;
    double seconds = 0.0;
    uint64_t held_out = 0;
    for (const ConfigScore& s : r.configs) {
        candidates.push_back(s.rank);
        seconds += s.fit_seconds;
        held_out = s.held_out_ratings;
        scores.push_back({{"rank", s.rank},
                          {"mean_log_predictive_density", number(s.mean_log_predictive_density)},
                          {"difference_to_best", number(s.difference_to_best)},
                          {"difference_se", number(s.difference_se)}});
    }
    return {{"rank", choice.rank},
            {"candidates", candidates},
            {"rule", r.rule},
            {"held_out_ratings", held_out},
            {"holdout_fraction", r.holdout_fraction},
            {"seconds", seconds},
            {"scores", scores}};
}

std::string describe(const RankChoice& choice) {
    const ComparisonResult& r = choice.comparison;
    std::vector<uint32_t> candidates;
    for (const ConfigScore& s : r.configs) candidates.push_back(s.rank);
    const ConfigScore& chosen = r.configs[r.recommended];
    const ConfigScore& best = r.configs[r.best];
    std::string line = fmt::format("rank {}, chosen from {} on {} held-out ratings: mean log predictive density {:.4f}",
                                   choice.rank, join(candidates), chosen.held_out_ratings,
                                   chosen.mean_log_predictive_density);
    if (r.recommended == r.best) return line + ", the best";
    return line + fmt::format(", within one SE of the best (rank {}: {:.4f}, paired difference {:.4f} ± {:.4f})",
                              best.rank, best.mean_log_predictive_density, chosen.difference_to_best,
                              chosen.difference_se);
}

}  // namespace credence
