// credence demo-data: writes the invented demo shop's export.
#include <iostream>
#include <memory>

#include <fmt/format.h>

#include "cli/commands.hpp"
#include "cli/demo_shop.hpp"

namespace credence::cli {

Runner add_demo_data_command(CLI::App& app) {
    auto dir = std::make_shared<std::string>("demo-data");
    auto o = std::make_shared<DemoShopOptions>();
    CLI::App* cmd = app.add_subcommand("demo-data", "Write the demo shop's ratings export (Thimbleford Goods, an invented shop)");
    cmd->add_option("--out-dir,-o", *dir, "Directory for ratings.csv and catalogue.csv")->capture_default_str();
    cmd->add_option("--customers", o->customers, "Number of customers")->check(CLI::Range(10u, 10000000u))->capture_default_str();
    cmd->add_option("--products", o->products, "Number of products")->check(CLI::Range(8u, 1000000u))->capture_default_str();
    cmd->add_option("--seed", o->seed, "Random seed")->capture_default_str();
    return [dir, o] {
        const auto files = write_demo_shop(*dir, *o);
        std::cout << fmt::format("wrote {} rows to {} and the catalogue to {}\n", files.ratings_written, files.ratings_path,
                                 files.catalogue_path);
        return 0;
    };
}

}  // namespace credence::cli
