// Tests for model/assess/model_delta.cpp: the customers and products that
// came and went between two models, the products whose predicted mean and
// uncertainty moved most (checked against the formula in the header,
// computed here by hand), customer ids kept out unless asked for, and the
// text and JSON forms.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <string>
#include <vector>

#include "model/assess/model_delta.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

// Last night's model: 20 customers, 50 products; tonight's: 25 customers
// (5 new), 45 products (sku-0045..0049 dropped). Numbered ids, so the
// shared ones have the same names.
const Posterior& before() {
    static const Posterior p = simulate_posterior(
        SimulatedPosteriorOptions{.users = 20, .items = 50, .rank = 3, .samples = 12, .chains = 2, .seed = 1});
    return p;
}
const Posterior& after() {
    static const Posterior p = simulate_posterior(
        SimulatedPosteriorOptions{.users = 25, .items = 45, .rank = 3, .samples = 12, .chains = 2, .seed = 2});
    return p;
}

// The header's a_s(i) for product `item` averaged over samples, and its sd.
std::pair<double, double> product_mean_and_sd(const Posterior& p, uint32_t item) {
    std::vector<double> a;
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        std::vector<double> mean_user(p.rank, 0.0);
        double mean_bias = 0.0;
        for (uint32_t u = 0; u < p.num_users; ++u) {
            for (uint32_t k = 0; k < p.rank; ++k) mean_user[k] += p.user_factor(s, u)[k] / double(p.num_users);
            mean_bias += p.user_bias_of(s, u) / double(p.num_users);
        }
        double x = p.global_mean + mean_bias + p.item_bias_of(s, item);
        for (uint32_t k = 0; k < p.rank; ++k) x += mean_user[k] * p.item_factor(s, item)[k];
        a.push_back(x);
    }
    double m = 0.0, q = 0.0;
    for (double x : a) m += x / double(a.size());
    for (double x : a) q += (x - m) * (x - m) / double(a.size());
    return {m, std::sqrt(q)};
}

}  // namespace

TEST_CASE("delta counts new and dropped customers and lists new and dropped products") {
    const ModelDelta d = model_delta(before(), after(), DeltaOptions{});
    CHECK(d.customers.before == 20);
    CHECK(d.customers.after == 25);
    CHECK(d.customers.kept == 20);
    CHECK(d.customers.added == 5);
    CHECK(d.customers.dropped == 0);
    CHECK(d.customers.added_ids.empty());  // personal data: counted, not listed
    CHECK(d.products.kept == 45);
    CHECK(d.products.added == 0);
    CHECK(d.products.dropped == 5);
    std::vector<std::string> dropped = d.products.dropped_ids;
    std::sort(dropped.begin(), dropped.end());
    CHECK(dropped == std::vector<std::string>{"sku-0045", "sku-0046", "sku-0047", "sku-0048", "sku-0049"});
    CHECK_FALSE(d.accuracy.has_value());

    const ModelDelta listed = model_delta(before(), after(), DeltaOptions{.list_customer_ids = true});
    std::vector<std::string> added = listed.customers.added_ids;
    std::sort(added.begin(), added.end());
    CHECK(added == std::vector<std::string>{"cust-0020", "cust-0021", "cust-0022", "cust-0023", "cust-0024"});
}

TEST_CASE("delta lists the products whose predicted mean and uncertainty moved most, largest first, as the formula "
          "gives them") {
    const ModelDelta d = model_delta(before(), after(), DeltaOptions{.top = 7});
    REQUIRE(d.mean_moves.size() == 7);
    REQUIRE(d.sd_moves.size() == 7);
    for (size_t k = 1; k < d.mean_moves.size(); ++k) {
        CHECK(std::abs(d.mean_moves[k - 1].mean_after - d.mean_moves[k - 1].mean_before) >=
              std::abs(d.mean_moves[k].mean_after - d.mean_moves[k].mean_before));
        CHECK(std::abs(d.sd_moves[k - 1].sd_after - d.sd_moves[k - 1].sd_before) >=
              std::abs(d.sd_moves[k].sd_after - d.sd_moves[k].sd_before));
    }
    // Every listed figure against the hand computation (float storage:
    // 1e-5 on figures of a few rating units).
    const IdMap items_before = IdMap::from_names(before().item_ids), items_after = IdMap::from_names(after().item_ids);
    for (const auto& list : {d.mean_moves, d.sd_moves})
        for (const ProductShift& x : list) {
            INFO(x.product);
            const auto [mb, sb] = product_mean_and_sd(before(), *items_before.find(x.product));
            const auto [ma, sa] = product_mean_and_sd(after(), *items_after.find(x.product));
            CHECK(x.mean_before == Approx(mb).margin(1e-5));
            CHECK(x.mean_after == Approx(ma).margin(1e-5));
            CHECK(x.sd_before == Approx(sb).margin(1e-5));
            CHECK(x.sd_after == Approx(sa).margin(1e-5));
        }
    // No kept product moved more than the first listed.
    double largest = 0.0;
    for (uint32_t i = 0; i < 45; ++i)
        largest = std::max(largest, std::abs(product_mean_and_sd(after(), i).first -
                                             product_mean_and_sd(before(), *items_before.find(after().item_ids[i])).first));
    CHECK(std::abs(d.mean_moves[0].mean_after - d.mean_moves[0].mean_before) == Approx(largest).margin(1e-5));
}

TEST_CASE("delta as text and JSON names the dropped products and the movers but no customer") {
    const ModelDelta d = model_delta(before(), after(), DeltaOptions{.top = 3});
    const std::string text = format_text(d);
    CHECK(text.find("customers: 20 -> 25 (20 kept, 5 new, 0 dropped)") != std::string::npos);
    CHECK(text.find("products: 50 -> 45 (45 kept, 0 new, 5 dropped)") != std::string::npos);
    CHECK(text.find("sku-0047") != std::string::npos);
    CHECK(text.find(d.mean_moves[0].product) != std::string::npos);
    CHECK(text.find("cust-") == std::string::npos);

    const nlohmann::json j = to_json(d);
    CHECK(j["customers"]["added"] == 5);
    CHECK(j["products"]["dropped"] == 5);
    CHECK(j["mean_moves"].size() == 3);
    CHECK(j["mean_moves"][0]["product"] == d.mean_moves[0].product);
    CHECK(j["accuracy"].is_null());
    CHECK(j.dump().find("cust-") == std::string::npos);
}
