// credence recommend: one customer's top-N from a posterior file, through the
// same prediction engine the server uses.
#include <iostream>
#include <memory>
#include <sstream>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/model_lookup.hpp"
#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct RecommendFlags {
    std::string model, user, rank_by = "mean", items;
    uint32_t n = 10;
    double level = 0.9;
    bool include_rated = false, json = false;
    uint64_t seed = 0;
};

RankBy parse_rank_by(const std::string& s) {
    if (s == "mean") return RankBy::mean;
    if (s == "lower") return RankBy::lower;
    if (s == "upper") return RankBy::upper;
    return RankBy::draw;
}

int run_recommend(const RecommendFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    PredictionEngine engine(posterior);
    const uint32_t u = find_index(posterior->user_ids, f.user, "user");
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
    const auto list = engine.recommend(u, options);
    if (f.json) {
        nlohmann::json items = nlohmann::json::array();
        for (const auto& r : list) {
            nlohmann::json j = prediction_json(r.prediction, f.level);
            j["item"] = posterior->item_ids[r.item];
            j["score"] = r.score;
            items.push_back(std::move(j));
        }
        std::cout << nlohmann::json{{"user", f.user}, {"rank_by", f.rank_by}, {"items", items}}.dump(2) << "\n";
        return 0;
    }
    std::cout << fmt::format("top {} for {} ranked by {} ({:.0f}% intervals):\n", list.size(), f.user, f.rank_by, 100 * f.level);
    int pos = 1;
    for (const auto& r : list)
        std::cout << fmt::format("{:>3}. {:<32} {:.2f} ± {:.2f}  [{:.2f} .. {:.2f}]\n", pos++, posterior->item_ids[r.item],
                                 r.prediction.mean, r.prediction.sd, r.prediction.lower, r.prediction.upper);
    return 0;
}

}  // namespace

Runner add_recommend_command(CLI::App& app) {
    auto f = std::make_shared<RecommendFlags>();
    CLI::App* cmd = app.add_subcommand("recommend", "Top-N items for one user, each with sd and credible interval");
    cmd->add_option("--model,-m", f->model, "Posterior file")->required()->check(CLI::ExistingFile);
    cmd->add_option("--user,-u", f->user, "User id as in the ratings export")->required();
    cmd->add_option("-n", f->n, "How many items")->check(CLI::Range(1u, 100000u))->capture_default_str();
    cmd->add_option("--rank-by", f->rank_by, "mean, lower (cautious), upper (optimistic) or draw (exploration)")
        ->check(CLI::IsMember({"mean", "lower", "upper", "draw"}))->capture_default_str();
    cmd->add_option("--level", f->level, "Credible interval level")->check(CLI::Range(0.001, 0.999))->capture_default_str();
    cmd->add_option("--items", f->items, "Comma-separated candidate item ids (default: all)");
    cmd->add_flag("--include-rated", f->include_rated, "Also list items the user already rated");
    cmd->add_option("--seed", f->seed, "Seed of the posterior draw for --rank-by draw")->capture_default_str();
    cmd->add_flag("--json", f->json, "Print JSON");
    return [f] { return run_recommend(*f); };
}

}  // namespace credence::cli
