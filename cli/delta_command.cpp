// credence delta: what changed between two posterior files (model/assess/model_delta.hpp).
#include <iostream>
#include <memory>

#include <fmt/format.h>

#include "cli/commands.hpp"
#include "cli/ingest_flags.hpp"
#include "model/assess/model_delta.hpp"
#include "model/data/ingest.hpp"
#include "model/posterior/posterior_file.hpp"

namespace credence::cli {

namespace {

struct DeltaFlags {
    std::string before, after;
    IngestFlags validation;
    bool json = false;
    uint32_t top = 10;
    bool show_customer_ids = false;
};

int run_delta(const DeltaFlags& f) {
    const Posterior before = read_posterior(f.before);
    const Posterior after = read_posterior(f.after);
    std::optional<IngestResult> v;
    if (!f.validation.path.empty()) {
        v = ingest_ratings(to_ingest_options(f.validation));
        std::cerr << describe(v->summary) << "\n";
    }
    DeltaOptions o;
    o.top = f.top;
    o.list_customer_ids = f.show_customer_ids;
    const ModelDelta d = model_delta(before, after, o, v ? &v->ratings : nullptr);
    if (f.json) std::cout << to_json(d).dump(2) << "\n";
    else std::cout << format_text(d);
    return 0;
}

}  // namespace

Runner add_delta_command(CLI::App& app) {
    auto f = std::make_shared<DeltaFlags>();
    CLI::App* cmd = app.add_subcommand(
        "delta", "What changed between two posterior files: customers and products, the products that moved most, "
                 "and held-out accuracy");
    cmd->add_option("before", f->before, "The earlier posterior file (e.g. the live model)")->required();
    cmd->add_option("after", f->after, "The later posterior file (e.g. tonight's fit)")->required();
    add_ingest_flags(*cmd, f->validation, "--validation");
    cmd->get_option("--validation")->required(false)->description(
        "Held-out ratings (file, sqlite:PATH or postgresql:// URI with --query) scored by both models, pair by pair");
    cmd->add_option("--top,-n", f->top, "Products listed per kind of move")->check(CLI::Range(0u, 100000u))->capture_default_str();
    cmd->add_flag("--show-customer-ids", f->show_customer_ids,
                  "List new and dropped customer ids (personal data; counted only by default)");
    cmd->add_flag("--json", f->json, "Print one JSON object instead of text");
    return [f] { return run_delta(*f); };
}

}  // namespace credence::cli
