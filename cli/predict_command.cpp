// credence predict: one customer's predicted rating of one product, with its
// sd and credible interval, through the same prediction engine the server uses.
#include <iostream>
#include <memory>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "cli/commands.hpp"
#include "cli/model_lookup.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"

namespace credence::cli {

namespace {

struct PredictFlags {
    std::string model, user, item;
    double level = 0.9;
    bool json = false;
};

int run_predict(const PredictFlags& f) {
    auto posterior = std::make_shared<const Posterior>(read_posterior(f.model));
    PredictionEngine engine(posterior);
    const uint32_t u = find_index(posterior->user_ids, f.user, "user");
    const uint32_t i = find_index(posterior->item_ids, f.item, "item");
    const Prediction p = engine.predict(u, i, f.level);
    if (f.json) {
        nlohmann::json j = prediction_json(p, f.level);
        j["user"] = f.user;
        j["item"] = f.item;
        std::cout << j.dump(2) << "\n";
    } else {
        std::cout << fmt::format("{} -> {}: {:.2f} ± {:.2f}  ({:.0f}% interval {:.2f} .. {:.2f})\n", f.user, f.item,
                                 p.mean, p.sd, 100 * f.level, p.lower, p.upper);
    }
    return 0;
}

}  // namespace

Runner add_predict_command(CLI::App& app) {
    auto f = std::make_shared<PredictFlags>();
    CLI::App* cmd = app.add_subcommand("predict", "Predicted rating of one user for one item, with sd and credible interval");
    cmd->add_option("--model,-m", f->model, "Posterior file")->required();
    cmd->add_option("--user,-u", f->user, "User id as in the ratings export")->required();
    cmd->add_option("--item,-i", f->item, "Item id as in the ratings export")->required();
    cmd->add_option("--level", f->level, "Credible interval level")->check(CLI::Range(0.001, 0.999))->capture_default_str();
    cmd->add_flag("--json", f->json, "Print JSON");
    return [f] { return run_predict(*f); };
}

}  // namespace credence::cli
