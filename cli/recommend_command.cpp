// credence recommend: top-N from a posterior file through the same
// prediction engine the server uses, for a customer in the model (--user) or
// for someone who is not, folded in exactly from a few ratings (--rated),
// through the same fold-in as the server's POST /v1/recommendations.
#include <charconv>
#include <iostream>
#include <memory>
#include <optional>
#include <sstream>
#include <string>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/model_lookup.hpp"
#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct RecommendFlags {
    std::string model, rank_by = "mean", items;
    std::optional<std::string> user;
    std::vector<std::string> rated;  // PRODUCT=STARS, one per rating
    uint32_t n = 10;
    double level = 0.9;
    bool include_rated = false, json = false;
    uint64_t seed = 0;
};

struct RatedFlag {
    std::string item;
    double stars = 0.0;
};

RankBy parse_rank_by(const std::string& s) {
    if (s == "mean") return RankBy::mean;
    if (s == "lower") return RankBy::lower;
    if (s == "upper") return RankBy::upper;
    return RankBy::draw;
}

// "PRODUCT=STARS"; split at the last '=' so product ids may contain one.
// Throws OptionError when there is no '=', no product or no number.
RatedFlag parse_rated(const std::string& text) {
    const auto eq = text.rfind('=');
    RatedFlag r;
    if (eq == std::string::npos || eq == 0)
        throw OptionError("--rated: expected PRODUCT=STARS (e.g. --rated tea-0001=5), not '" + text + "'");
    r.item = text.substr(0, eq);
    const char* first = text.data() + eq + 1;
    const char* last = text.data() + text.size();
    const auto [end, ec] = std::from_chars(first, last, r.stars);
    if (first == last || ec != std::errc() || end != last)
        throw OptionError("--rated: '" + std::string(first, last) + "' in '" + text +
                          "' is not a number of stars (e.g. --rated tea-0001=4.5)");
    return r;
}

// Exactly one of --user and --rated. Throws OptionError naming both otherwise.
void check_who(const RecommendFlags& f) {
    if (f.user && !f.rated.empty())
        throw OptionError("--user and --rated are alternatives: --user for a customer in the model, "
                          "--rated PRODUCT=STARS (repeatable) for someone who is not");
    if (!f.user && f.rated.empty())
        throw OptionError("say who to recommend for: --user CUSTOMER for a customer in the model, or "
                          "--rated PRODUCT=STARS (repeatable) to fold in someone who is not");
}

void print_list(const RecommendFlags& f, const Posterior& p, const std::vector<Recommendation>& list) {
    if (f.json) {
        nlohmann::json items = nlohmann::json::array();
        for (const auto& r : list) {
            nlohmann::json j = prediction_json(r.prediction, f.level);
            j["item"] = p.item_ids[r.item];
            j["score"] = r.score;
            items.push_back(std::move(j));
        }
        nlohmann::json out = {{"rank_by", f.rank_by}, {"items", items}};
        if (f.user) {
            out["user"] = *f.user;
        } else {
            out["rated"] = f.rated.size();
        }
        // As the server answers: only a draw ranking has a seed, as a decimal string.
        if (f.rank_by == "draw") out["seed"] = std::to_string(f.seed);
        std::cout << out.dump(2) << "\n";
        return;
    }
    const std::string who = f.user ? *f.user : fmt::format("a visitor with {} rating(s)", f.rated.size());
    std::cout << fmt::format("top {} for {} ranked by {} ({:.0f}% intervals):\n", list.size(), who, f.rank_by,
                             100 * f.level);
    int pos = 1;
    for (const auto& r : list)
        std::cout << fmt::format("{:>3}. {:<32} {:.2f} ± {:.2f}  [{:.2f} .. {:.2f}]\n", pos++, p.item_ids[r.item],
                                 r.prediction.mean, r.prediction.sd, r.prediction.lower, r.prediction.upper);
}

int run_recommend(const RecommendFlags& f) {
    check_who(f);
    std::vector<RatedFlag> rated;
    for (const auto& text : f.rated) rated.push_back(parse_rated(text));

    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    PredictionEngine engine(posterior);
    RecommendOptions options;
    options.n = f.n;
    options.rank_by = parse_rank_by(f.rank_by);
    options.level = f.level;
    options.exclude_rated = !f.include_rated;
    options.draw_seed = f.seed;
    if (!f.items.empty()) {
        std::vector<uint32_t> candidates;
        std::stringstream ss(f.items);
        for (std::string id; std::getline(ss, id, ',');)
            if (!id.empty()) candidates.push_back(find_index(posterior->item_ids, id, "item"));
        options.candidates = std::move(candidates);
    }
    if (f.user) {
        const uint32_t u = find_index(posterior->user_ids, *f.user, "user");
        print_list(f, *posterior, engine.recommend(u, options));
        return 0;
    }
    std::vector<VisitorRating> ratings;
    for (const auto& r : rated) ratings.push_back({find_index(posterior->item_ids, r.item, "item"), r.stars});
    // Deterministic but for --rank-by draw, which --seed keys, as in the server.
    print_list(f, *posterior, recommend_for_visitor(engine, ratings, options));
    return 0;
}

}  // namespace

Runner add_recommend_command(CLI::App& app) {
    auto f = std::make_shared<RecommendFlags>();
    CLI::App* cmd = app.add_subcommand(
        "recommend", "Top-N items for one user, or for a visitor from a few ratings, each with sd and credible interval");
    cmd->add_option("--model,-m", f->model, "Posterior file")->required();
    cmd->add_option("--user,-u", f->user, "User id as in the ratings export (or give --rated)");
    cmd->add_option("--rated", f->rated,
                    "PRODUCT=STARS: a rating of someone not in the model, folded in; repeat for each product "
                    "(instead of --user)");
    cmd->add_option("-n", f->n, "How many items")->check(CLI::Range(1u, 100000u))->capture_default_str();
    cmd->add_option("--rank-by", f->rank_by, "mean, lower (cautious), upper (optimistic) or draw (exploration)")
        ->check(CLI::IsMember({"mean", "lower", "upper", "draw"}))->capture_default_str();
    cmd->add_option("--level", f->level, "Credible interval level")->check(CLI::Range(0.001, 0.999))->capture_default_str();
    cmd->add_option("--items", f->items, "Comma-separated candidate item ids (default: all)");
    cmd->add_flag("--include-rated", f->include_rated, "Also list items the user (or visitor) already rated");
    cmd->add_option("--seed", f->seed, "Seed of the posterior draw for --rank-by draw (the only ranking that draws)")
        ->capture_default_str();
    cmd->add_flag("--json", f->json, "Print JSON");
    return [f] { return run_recommend(*f); };
}

}  // namespace credence::cli
