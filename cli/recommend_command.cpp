// credence recommend: top-N from a posterior file through the same
// prediction engine the server uses, for a customer in the model (--user) or
// for someone who is not, folded in exactly from a few ratings (--rated),
// through the same fold-in as the server's POST /v1/recommendations.
#include <algorithm>
#include <charconv>
#include <iostream>
#include <set>
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
#include "model/predict/item_statistics.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct RecommendFlags {
    std::string model, rank_by = "mean", items, category;
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

// What the viewer rated, for the "why" of each entry; ratings are known
// only for a visitor (the posterior file keeps which products a customer
// rated, not the values).
struct Rated {
    std::vector<uint32_t> items;
    std::vector<double> ratings;  // empty, or one per item
};

// The item's id with its catalogue name when there is one.
std::string shown(const Posterior& p, uint32_t i) {
    return p.item_name(i).empty() ? p.item_ids[i] : p.item_ids[i] + " " + p.item_name(i);
}

struct Why {
    uint32_t rating_count = 0;
    std::vector<SimilarItem> similar;
};

// Up to 3 of the viewer's rated products most similar to the item, with a
// positive similarity (as the server's "why": model/predict/item_statistics.hpp).
Why why_of(const Posterior& p, const ItemStatistics& st, uint32_t item, const Rated& rated) {
    Why why{st.rating_count[item], most_similar_among(p, st, item, rated.items, 3)};
    // Only a positive similarity explains anything (the list is best first).
    std::erase_if(why.similar, [](const SimilarItem& s) { return !(s.similarity > 0.0); });
    return why;
}

std::optional<double> rating_of(const Rated& rated, uint32_t item) {
    if (rated.ratings.empty()) return std::nullopt;
    const auto at = std::find(rated.items.begin(), rated.items.end(), item);
    return rated.ratings[static_cast<size_t>(at - rated.items.begin())];
}

void print_list(const RecommendFlags& f, const Posterior& p, const std::vector<Recommendation>& list,
                const Rated& rated) {
    const ItemStatistics st = compute_item_statistics(p);
    if (f.json) {
        nlohmann::json items = nlohmann::json::array();
        for (const auto& r : list) {
            nlohmann::json j = prediction_json(r.prediction, f.level);
            j["item"] = p.item_ids[r.item];
            if (!p.item_name(r.item).empty()) j["name"] = p.item_name(r.item);
            if (!p.item_category(r.item).empty()) j["category"] = p.item_category(r.item);
            j["rank_value"] = r.rank_value;
            j["rank_value_unclipped"] = r.score;
            const Why why = why_of(p, st, r.item, rated);
            nlohmann::json similar = nlohmann::json::array();
            for (const SimilarItem& s : why.similar) {
                nlohmann::json e = {{"item", p.item_ids[s.item]}, {"similarity", s.similarity}};
                if (!p.item_name(s.item).empty()) e["name"] = p.item_name(s.item);
                if (!p.item_category(s.item).empty()) e["category"] = p.item_category(s.item);
                if (const auto stars = rating_of(rated, s.item)) e["rating"] = *stars;
                similar.push_back(std::move(e));
            }
            j["why"] = {{"rating_count", why.rating_count}, {"similar_rated", std::move(similar)}};
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
    for (const auto& r : list) {
        std::cout << fmt::format("{:>3}. {:<32} {:.2f} ± {:.2f}  [{:.2f} .. {:.2f}]", pos++, p.item_ids[r.item],
                                 r.prediction.mean, r.prediction.sd, r.prediction.lower, r.prediction.upper);
        if (!p.item_name(r.item).empty()) std::cout << "  " << p.item_name(r.item);
        // The ranked number when it is not the mean shown; past a scale end
        // also the unclipped value, which orders the items tied there.
        if (f.rank_by != "mean") {
            std::cout << fmt::format("  (ranked by {} {:.2f}", f.rank_by, r.rank_value);
            if (r.rank_value != r.score) std::cout << fmt::format(", {:.2f} unclipped", r.score);
            std::cout << ")";
        }
        std::cout << "\n";
        const Why why = why_of(p, st, r.item, rated);
        std::string line = fmt::format("       why: {} rating{} in training", why.rating_count,
                                       why.rating_count == 1 ? "" : "s");
        for (size_t k = 0; k < why.similar.size(); ++k) {
            const SimilarItem& s = why.similar[k];
            line += k == 0 ? "; near what was rated: " : ", ";
            line += shown(p, s.item);
            if (const auto stars = rating_of(rated, s.item))
                line += fmt::format(" (rated {:g}, similarity {:.2f})", *stars, s.similarity);
            else
                line += fmt::format(" (similarity {:.2f})", s.similarity);
        }
        std::cout << line << "\n";
    }
}

// The catalogue products of one category. Throws OptionError when the model
// has no catalogue or no product has that category (listing the known ones).
std::vector<uint32_t> category_products(const Posterior& p, const std::string& category) {
    if (!p.has_catalogue())
        throw OptionError("--category needs a model fitted with a catalogue (credence fit --catalogue FILE)");
    std::vector<uint32_t> out;
    std::set<std::string> known;
    for (uint32_t i = 0; i < p.num_items; ++i) {
        if (p.item_category(i) == category) out.push_back(i);
        if (!p.item_category(i).empty()) known.insert(p.item_category(i));
    }
    if (out.empty()) {
        std::string list;
        for (const auto& k : known) list += (list.empty() ? "" : ", ") + k;
        throw OptionError("--category: no product has category '" + category + "'; the catalogue's categories are: " +
                          (list.empty() ? "(none)" : list));
    }
    return out;
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
    if (!f.category.empty()) {
        std::vector<uint32_t> in_category = category_products(*posterior, f.category);
        if (options.candidates)
            std::erase_if(*options.candidates, [&](uint32_t i) {
                return !std::binary_search(in_category.begin(), in_category.end(), i);
            });
        else
            options.candidates = std::move(in_category);
    }
    if (f.user) {
        const uint32_t u = find_index(posterior->user_ids, *f.user, "user");
        const auto rated_span = posterior->rated_by(u);
        print_list(f, *posterior, engine.recommend(u, options), Rated{{rated_span.begin(), rated_span.end()}, {}});
        return 0;
    }
    std::vector<VisitorRating> ratings;
    Rated by_visitor;
    for (const auto& r : rated) {
        ratings.push_back({find_index(posterior->item_ids, r.item, "item"), r.stars});
        by_visitor.items.push_back(ratings.back().item);
        by_visitor.ratings.push_back(r.stars);
    }
    // Deterministic but for --rank-by draw, which --seed keys, as in the server.
    print_list(f, *posterior, recommend_for_visitor(engine, ratings, options), by_visitor);
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
    cmd->add_option("--category", f->category,
                    "Only products of this catalogue category (a model fitted with --catalogue)");
    cmd->add_flag("--include-rated", f->include_rated, "Also list items the user (or visitor) already rated");
    cmd->add_option("--seed", f->seed, "Seed of the posterior draw for --rank-by draw (the only ranking that draws)")
        ->capture_default_str();
    cmd->add_flag("--json", f->json, "Print JSON");
    return [f] { return run_recommend(*f); };
}

}  // namespace credence::cli
