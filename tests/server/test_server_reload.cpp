// Tests for server/ model swapping: reload under load (concurrent clients on
// loopback, bounded in count and time, while the model is swapped 10 times
// between two files) loses no request and every answer comes whole from one
// model; SIGHUP re-reads the model file.
#include <catch2/catch.hpp>

#include <atomic>
#include <chrono>
#include <map>
#include <thread>

#include <fstream>
#include <mutex>

#include <nlohmann/json.hpp>

#include "model/posterior/posterior_file.hpp"
#include "model/predict/predict.hpp"
#include "tests/support/simulate.hpp"
#include "server/model_slot.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/server_process.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;
using nlohmann::json;

namespace {

const std::string kToken = "reload-token-93be7a";

SimulatedPosteriorOptions shop_spec(uint64_t seed) {
    SimulatedPosteriorOptions spec{.users = 30, .items = 400, .rank = 6, .samples = 12, .chains = 2, .seed = seed};
    spec.rated_fraction = 0.05;
    return spec;
}

// Offline answers of one model for the fixed batch, keyed by its fingerprint.
struct Expected {
    std::vector<Prediction> predictions;
};

}  // namespace

TEST_CASE("reload under load: no failed request, every answer from one whole model") {
    const fs::path dir = scratch_dir("server_reload");
    const fs::path a_path = dir / "spring.posterior", b_path = dir / "summer.posterior";
    const Posterior model_a = simulate_posterior(shop_spec(11));  // model b has the same ids
    write_posterior(model_a, a_path.string());
    write_posterior(simulate_posterior(shop_spec(12)), b_path.string());

    // The batch every client sends, and each model's offline answers to it.
    json pairs = json::array();
    std::vector<std::pair<uint32_t, uint32_t>> index;
    for (uint32_t k = 0; k < 8; ++k) {
        index.emplace_back((k * 11) % 30, (k * 47 + 3) % 400);
        pairs.push_back({{"user", model_a.user_ids[index.back().first]},
                         {"item", model_a.item_ids[index.back().second]}});
    }
    const std::string body = json{{"pairs", pairs}}.dump();
    std::map<std::string, Expected> expected;
    for (const auto& path : {a_path, b_path}) {
        auto p = std::make_shared<const Posterior>(read_posterior(path.string()));
        PredictionEngine engine(p);
        Expected e;
        for (auto [u, i] : index) e.predictions.push_back(engine.predict(u, i, 0.9));
        expected[server::posterior_fingerprint(*p)] = e;
    }
    REQUIRE(expected.size() == 2);

    std::ofstream(dir / "admin.token") << kToken;
    ServerProcess server(dir, a_path,
                         "access_log = false\nadmin_token_file = \"" + (dir / "admin.token").string() +
                             "\"\nmodel_dir = \"" + dir.string() + "\"\n");

    std::atomic<bool> done{false};
    std::atomic<uint64_t> ok{0}, failed{0}, torn{0};
    std::mutex seen_mutex;
    std::map<std::string, uint64_t> answered_by;
    const auto deadline = std::chrono::steady_clock::now() + std::chrono::seconds(30);
    std::vector<std::thread> clients;
    for (int t = 0; t < 3; ++t) {
        clients.emplace_back([&] {
            auto c = server.client();
            std::map<std::string, uint64_t> local;
            while (!done && std::chrono::steady_clock::now() < deadline) {
                auto r = c->Post("/v1/predictions", body, "application/json");
                if (!r || r->status != 200) {
                    ++failed;
                    continue;
                }
                const json answer = json::parse(r->body, nullptr, false);
                const std::string model = answer.is_object() ? answer.value("model", "") : "";
                const auto it = expected.find(model);
                bool whole = it != expected.end() && r->get_header_value("Credence-Model") == model;
                for (size_t k = 0; whole && k < index.size(); ++k) {
                    const auto& got = answer["predictions"][k];
                    const auto& want = it->second.predictions[k];
                    whole = got["mean"].get<double>() == want.mean && got["sd"].get<double>() == want.sd &&
                            got["lower"].get<double>() == want.lower && got["upper"].get<double>() == want.upper;
                }
                if (!whole) ++torn;
                ++ok;
                ++local[model];
            }
            std::lock_guard lock(seen_mutex);
            for (auto& [m, n] : local) answered_by[m] += n;
        });
    }

    auto admin = server.client();
    const httplib::Headers bearer{{"Authorization", "Bearer " + kToken}};
    int reloads_ok = 0;
    for (int k = 0; k < 10; ++k) {
        std::this_thread::sleep_for(std::chrono::milliseconds(150));
        const fs::path next = k % 2 == 0 ? b_path : a_path;
        auto r = admin->Post("/v1/admin/reload", bearer, json{{"path", next.filename().string()}}.dump(),
                             "application/json");
        if (r && r->status == 200) ++reloads_ok;
    }
    std::this_thread::sleep_for(std::chrono::milliseconds(150));
    done = true;
    for (auto& t : clients) t.join();

    INFO("ok=" << ok << " failed=" << failed << " torn=" << torn);
    CHECK(reloads_ok == 10);
    CHECK(failed == 0);
    CHECK(torn == 0);
    CHECK(ok > 0);
    // Both models answered during the run (the swaps really happened under load).
    CHECK(answered_by.size() == 2);
    // After an even number of swaps the first model is back.
    auto final_model = json::parse(admin->Get("/v1/model")->body);
    CHECK(final_model["model"] == server::posterior_fingerprint(read_posterior(a_path.string())));
    CHECK(server.stop() == 0);
}

TEST_CASE("SIGHUP re-reads the model file; a bad file keeps the old model") {
    const fs::path dir = scratch_dir("server_sighup");
    const fs::path path = dir / "shop.posterior";
    write_posterior(simulate_posterior(shop_spec(21)), path.string());
    ServerProcess server(dir, path, "access_log = false\n");
    auto c = server.client();
    const std::string first = json::parse(c->Get("/v1/model")->body)["model"];

    const Posterior next = simulate_posterior(shop_spec(22));
    write_posterior(next, path.string());
    server.signal(SIGHUP);
    const std::string want = server::posterior_fingerprint(next);
    std::string now = first;
    for (int k = 0; k < 300 && now != want; ++k) {
        std::this_thread::sleep_for(std::chrono::milliseconds(50));
        now = json::parse(c->Get("/v1/model")->body)["model"];
    }
    CHECK(now == want);

    // A broken file: the reload fails, the model stays, the server keeps answering.
    std::ofstream(path, std::ios::trunc) << "truncated";
    server.signal(SIGHUP);
    std::this_thread::sleep_for(std::chrono::milliseconds(500));
    auto r = c->Get("/v1/model");
    REQUIRE(r);
    CHECK(r->status == 200);
    CHECK(json::parse(r->body)["model"] == want);
    CHECK(server.stop() == 0);
    CHECK(server.log().find("reload on SIGHUP failed") != std::string::npos);
}
