// Tests for server/: the real server in another process on an ephemeral
// loopback port, every route exercised with a real HTTP client, bad inputs
// included. Answers are checked against the offline PredictionEngine (exact
// equality) and against direct computation for the item statistics.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <fstream>
#include <memory>
#include <set>
#include <sstream>
#include <thread>

#include "model/math/cpu_level.hpp"
#include "model/posterior/posterior_file.hpp"
#include "model/predict/foldin.hpp"
#include "model/predict/item_statistics.hpp"
#include "model/predict/predict.hpp"
#include "tests/support/simulate.hpp"
#include "server/app.hpp"
#include "tests/support/paths.hpp"
#include "tests/support/server_http.hpp"
#include "tests/support/server_process.hpp"

namespace fs = std::filesystem;
using namespace credence;
using namespace credence::testing;
using nlohmann::json;

namespace {

// Ids chosen to stress routing: a slash, a space, a non-ASCII letter, URL
// metacharacters, and an item whose id ends in "/similar".
const std::string kOddUser = "cust/07 \xC3\xBC?&#";
const std::string kOddItem = "SKU 19/B%";
const std::string kSimilarItem = "gift/similar";
const std::string kToken = "shop-admin-4f9c2b7d1e";

struct Fixture {
    fs::path dir;
    fs::path model_path, other_path, corrupt_path;
    std::shared_ptr<const Posterior> posterior;  // as read back from the file
    std::unique_ptr<PredictionEngine> engine;
    std::unique_ptr<ServerProcess> server;

    Fixture() {
        dir = scratch_dir("server_http");
        SimulatedPosteriorOptions spec{.users = 40, .items = 120, .rank = 4, .samples = 16, .chains = 2};
        spec.rated_fraction = 0.1;
        spec.id_digits = 5;  // the requests below name "cust-00001", "sku-00010", ...
        Posterior p = simulate_posterior(spec);
        p.user_ids[3] = kOddUser;
        p.item_ids[5] = kOddItem;
        p.item_ids[6] = kSimilarItem;
        // A catalogue of the invented shop: every item named, three categories.
        for (uint32_t i = 0; i < p.num_items; ++i) {
            p.item_names.push_back("Thimbleford piece " + std::to_string(i));
            p.item_categories.push_back(i % 3 == 0 ? "kitchen" : i % 3 == 1 ? "pantry" : "garden");
        }
        model_path = dir / "shop.posterior";
        write_posterior(p, model_path.string());
        spec.seed = 2;
        other_path = dir / "shop-next.posterior";
        write_posterior(simulate_posterior(spec), other_path.string());
        corrupt_path = dir / "broken.posterior";
        std::ofstream(corrupt_path) << "not a posterior file";
        posterior = std::make_shared<const Posterior>(read_posterior(model_path.string()));
        engine = std::make_unique<PredictionEngine>(posterior);
        std::ofstream(dir / "admin.token") << kToken << "\n";
        server = std::make_unique<ServerProcess>(
            dir, model_path,
            "max_batch = 50\nmax_n = 100\nbody_limit_bytes = 65536\naccess_log = true\n"
            "admin_token_file = \"" + (dir / "admin.token").string() + "\"\nmodel_dir = \"" + dir.string() + "\"\n");
    }
};

Fixture& fixture() {
    static Fixture f;
    return f;
}

void require_problem(const Answer& a, int status) {
    INFO(a.text);
    REQUIRE(a.status == status);
    REQUIRE(a.content_type == "application/problem+json");
    REQUIRE(a.body.is_object());
    CHECK(a.body["status"] == status);
    CHECK(a.body["type"].get<std::string>().rfind("urn:credence:problem:", 0) == 0);
    CHECK(!a.body["title"].get<std::string>().empty());
    CHECK(!a.body["detail"].get<std::string>().empty());
    CHECK(a.body.contains("instance"));
}

void require_same_prediction(const json& got, const Prediction& want) {
    CHECK(got["mean"].get<double>() == want.mean);
    CHECK(got["sd"].get<double>() == want.sd);
    CHECK(got["lower"].get<double>() == want.lower);
    CHECK(got["upper"].get<double>() == want.upper);
}

std::string user_path(const std::string& user) { return "/v1/users/" + url_encode(user) + "/recommendations"; }

const std::string kUserRoute = "/v1/users/{user}/recommendations";

}  // namespace

TEST_CASE("health, readiness and the model description") {
    auto& f = fixture();
    auto c = f.server->client();
    auto health = get(*c, "/v1/health", "/v1/health");
    REQUIRE(health.status == 200);
    CHECK(health.body["status"] == "alive");
    auto ready = get(*c, "/v1/ready", "/v1/ready");
    REQUIRE(ready.status == 200);
    const std::string fingerprint = ready.body["model"];
    CHECK(fingerprint.size() == 16);
    CHECK(ready.model_header == fingerprint);

    auto model = get(*c, "/v1/model", "/v1/model");
    REQUIRE(model.status == 200);
    CHECK(model.body["rank"] == 4);
    CHECK(model.body["samples"] == 16);
    CHECK(model.body["chains"] == 2);
    CHECK(model.body["data"]["customers"] == 40);
    CHECK(model.body["data"]["products"] == 120);
    CHECK(model.body["data"]["ratings"] == f.posterior->rated_items.size());
    CHECK(model.body["data"]["products_named"] == 120);
    CHECK(model.body["scale"]["min"] == 1.0);
    CHECK(model.body["scale"]["max"] == 5.0);
    CHECK(model.body["convergence"]["verdict"] == "not assessed");
    CHECK(model.body["model"] == fingerprint);
    // A summary: the traces and the per-quantity figures have their own routes.
    CHECK_FALSE(model.body.contains("diagnostics"));
    CHECK(model.text.find("\"trace\"") == std::string::npos);
    auto diagnostics = get(*c, "/v1/model/diagnostics", "/v1/model/diagnostics");
    REQUIRE(diagnostics.status == 200);
    CHECK(diagnostics.body["diagnostics"]["verdict"] == "not assessed");
    auto trace = get(*c, "/v1/model/trace", "/v1/model/trace");
    REQUIRE(trace.status == 200);
    CHECK(trace.body["trace"].is_object());
    CHECK(trace.body["model"] == fingerprint);
    require_problem(get(*c, "/v1/model", "/v1/model?verbose=true"), 400);
}

TEST_CASE("predictions equal the offline engine exactly, per pair") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    json pairs = json::array();
    std::vector<std::pair<uint32_t, uint32_t>> index;
    for (uint32_t k = 0; k < 30; ++k) {
        const uint32_t u = (k * 7) % p.num_users, i = (k * 13 + 5) % p.num_items;
        pairs.push_back({{"user", p.user_ids[u]}, {"item", p.item_ids[i]}});
        index.emplace_back(u, i);
    }
    for (double level : {0.9, 0.5}) {
        json req = {{"pairs", pairs}};
        if (level != 0.9) req["level"] = level;
        auto a = post(*c, "/v1/predictions", "/v1/predictions", req.dump());
        REQUIRE(a.status == 200);
        CHECK(a.body["level"] == level);
        REQUIRE(a.body["predictions"].size() == index.size());
        for (size_t k = 0; k < index.size(); ++k) {
            const auto& got = a.body["predictions"][k];
            CHECK(got["user"] == p.user_ids[index[k].first]);
            CHECK(got["item"] == p.item_ids[index[k].second]);
            CHECK(got["source"] == "model");
            require_same_prediction(got, f.engine->predict(index[k].first, index[k].second, level));
        }
    }
}

TEST_CASE("unknown ids fail per pair; the population answer on request covers unknown customers only") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    json pairs = json::array({{{"user", p.user_ids[0]}, {"item", p.item_ids[0]}},
                              {{"user", "cust-nobody"}, {"item", p.item_ids[1]}},
                              {{"user", p.user_ids[1]}, {"item", "sku-discontinued"}},
                              {{"user", "cust-nobody"}, {"item", "sku-discontinued"}}});
    auto strict = post(*c, "/v1/predictions", "/v1/predictions", json{{"pairs", pairs}}.dump());
    REQUIRE(strict.status == 200);
    const auto& s = strict.body["predictions"];
    CHECK(s[0]["source"] == "model");
    for (int k = 1; k < 4; ++k) {
        CHECK(s[k]["error"]["status"] == 404);
        CHECK_FALSE(s[k].contains("mean"));
    }
    CHECK(s[1]["error"]["title"] == "Unknown user");
    CHECK(s[2]["error"]["title"] == "Unknown item");

    auto lenient =
        post(*c, "/v1/predictions", "/v1/predictions", json{{"pairs", pairs}, {"fallback", "population"}}.dump());
    REQUIRE(lenient.status == 200);
    const auto& l = lenient.body["predictions"];
    require_same_prediction(l[0], f.engine->predict(0, 0, 0.9));
    // An unknown product is an error whatever the fallback: a typo must not get a plausible rating.
    for (int k = 2; k < 4; ++k) {
        INFO(l[k].dump());
        CHECK(l[k]["error"]["title"] == "Unknown item");
        CHECK_FALSE(l[k].contains("mean"));
    }
    for (int k = 1; k < 2; ++k) {
        INFO(l[k].dump());
        CHECK(l[k]["source"] == "population");
        const double lower = l[k]["lower"], mean = l[k]["mean"], upper = l[k]["upper"], sd = l[k]["sd"];
        CHECK(p.scale.min <= lower);
        CHECK(lower <= mean);
        CHECK(mean <= upper);
        CHECK(upper <= p.scale.max);
        // The population answer cannot be surer than the noise alone:
        // sd >= 1/sqrt(max tau) (a mixture's variance is at least the least variance).
        CHECK(sd >= 1.0 / std::sqrt(*std::max_element(p.noise_precision.begin(), p.noise_precision.end())));
    }
    // An unseen user is less predictable than a known one for the same item.
    CHECK(l[1]["sd"].get<double>() > f.engine->predict(0, 1, 0.9).sd);
}

TEST_CASE("bad prediction requests get problem documents") {
    auto& f = fixture();
    auto c = f.server->client();
    const std::string pair = R"({"user":"cust-00000","item":"sku-00000"})";
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", "{not json"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", "[1,2]"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs": 3})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[)" + pair + R"(], "level": 1.0})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[)" + pair + R"(], "level": 0})"), 400);
    // Within 1e-16 of 1, (1 + level)/2 rounds to 1 in double precision: a 400, never a 500.
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[)" + pair + R"(], "level": 0.9999999999999999})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[)" + pair + R"(], "level": "high"})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[{"user": 7, "item": "sku-00000"}]})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[{"user": "cust-00000"}]})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions", R"({"pairs":[)" + pair + R"(], "fallback": "guess"})"), 400);
    // Bounded work: the configured batch limit is 50 pairs.
    std::string big = R"({"pairs":[)";
    for (int k = 0; k < 51; ++k) big += (k ? "," : "") + pair;
    big += "]}";
    auto over = post(*c, "/v1/predictions", "/v1/predictions", big);
    require_problem(over, 400);
    CHECK(over.body["detail"].get<std::string>().find("50") != std::string::npos);
    // The body limit is 64 KiB.
    auto huge = post(*c, "/v1/predictions", "/v1/predictions", std::string(70000, ' '));
    require_problem(huge, 413);
    // The server is still fine afterwards.
    CHECK(get(*c, "/v1/health", "/v1/health").status == 200);
}

TEST_CASE("user top-N equals the offline engine for every ranking") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    for (uint32_t u : {0u, 3u, 17u}) {
        for (const char* rank_by : {"mean", "lower", "upper", "draw"}) {
            RecommendOptions o;
            o.n = 7;
            o.level = 0.8;
            o.rank_by = server::parse_rank_by(rank_by);
            o.draw_seed = 99;
            const auto want = f.engine->recommend(u, o);
            auto a = get(*c, kUserRoute, user_path(p.user_ids[u]) + "?n=7&level=0.8&seed=99&rank_by=" + rank_by);
            INFO(a.text);
            REQUIRE(a.status == 200);
            CHECK(a.body["user"] == p.user_ids[u]);
            CHECK(a.body["rank_by"] == rank_by);
            // A draw ranking echoes its seed as a string (JavaScript-safe); no other ranking has one.
            if (o.rank_by == RankBy::draw) {
                CHECK(a.body["seed"] == "99");
            } else {
                CHECK_FALSE(a.body.contains("seed"));
            }
            CHECK(a.body["level"] == 0.8);
            REQUIRE(a.body["items"].size() == want.size());
            for (size_t k = 0; k < want.size(); ++k) {
                CHECK(a.body["items"][k]["item"] == p.item_ids[want[k].item]);
                CHECK(a.body["items"][k]["rank_value"].get<double>() == want[k].rank_value);
                CHECK(a.body["items"][k]["rank_value_unclipped"].get<double>() == want[k].score);
                CHECK_FALSE(a.body["items"][k].contains("score"));
                require_same_prediction(a.body["items"][k], want[k].prediction);
            }
        }
    }
    SECTION("candidates and rated items") {
        RecommendOptions o;
        o.n = 3;
        o.exclude_rated = false;
        o.candidates = std::vector<uint32_t>{5, 6, 9, 40};
        const auto want = f.engine->recommend(3, o);
        auto a = get(*c, kUserRoute,
                     user_path(kOddUser) + "?n=3&exclude_rated=false&items=" + url_encode(kOddItem) + "&items=" +
                         url_encode(kSimilarItem) + "&items=sku-00009&items=sku-00040");
        INFO(a.text);
        REQUIRE(a.status == 200);
        REQUIRE(a.body["items"].size() == want.size());
        for (size_t k = 0; k < want.size(); ++k) CHECK(a.body["items"][k]["item"] == p.item_ids[want[k].item]);
        // The same candidates as one comma list, and mixed with a repeat. The
        // client must send the commas as they are (httplib, like a browser's
        // URLSearchParams, would encode them as %2C, which is part of an id).
        auto verbatim = f.server->client();
        verbatim->set_url_encode(false);
        const std::string listed = user_path(kOddUser) + "?n=3&exclude_rated=false&items=" + url_encode(kOddItem) +
                                   "," + url_encode(kSimilarItem) + ",sku-00009";
        auto comma = get(*verbatim, kUserRoute, listed + "&items=sku-00040");
        INFO(comma.text);
        REQUIRE(comma.status == 200);
        CHECK(comma.body["items"] == a.body["items"]);
        require_problem(get(*verbatim, kUserRoute, listed + ",,sku-00040"), 400);
    }
    SECTION("an id with a comma is one id when the comma is percent-encoded") {
        // url_encode leaves ',' alone, so encode it by hand: "sku-00009%2Csku-00010" names no product.
        auto a = get(*c, kUserRoute, user_path(p.user_ids[0]) + "?items=sku-00009%2Csku-00010");
        require_problem(a, 404);
        CHECK(a.body["detail"].get<std::string>().find("sku-00009,sku-00010") != std::string::npos);
        // The detail says how to list several ids when the commas came encoded.
        CHECK(a.body["detail"].get<std::string>().find("repeat items=") != std::string::npos);
    }
}

TEST_CASE("every recommendation says why: its rating count and the viewer's most similar rated products") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t u = 17;
    const auto rated = p.rated_by(u);
    REQUIRE(rated.size() >= 3);
    auto a = get(*c, kUserRoute, user_path(p.user_ids[u]) + "?n=8");
    INFO(a.text);
    REQUIRE(a.status == 200);
    REQUIRE(a.body["items"].size() == 8);
    for (const auto& entry : a.body["items"]) {
        const auto at = std::find(p.item_ids.begin(), p.item_ids.end(), entry["item"].get<std::string>());
        REQUIRE(at != p.item_ids.end());
        const auto i = static_cast<uint32_t>(at - p.item_ids.begin());
        CHECK(entry["why"]["rating_count"] == st.rating_count[i]);
        // The model's own ranking of the customer's rated products, positive similarities only.
        std::vector<SimilarItem> want = most_similar_among(p, st, i, rated, 3);
        std::erase_if(want, [](const SimilarItem& s) { return !(s.similarity > 0.0); });
        const auto& similar = entry["why"]["similar_rated"];
        REQUIRE(similar.size() == want.size());
        for (size_t k = 0; k < want.size(); ++k) {
            CHECK(similar[k]["item"] == p.item_ids[want[k].item]);
            CHECK(similar[k]["name"] == p.item_name(want[k].item));
            CHECK(similar[k]["similarity"].get<double>() == want[k].similarity);
            CHECK(std::binary_search(rated.begin(), rated.end(), want[k].item));
            // A known customer's ratings are not in the model file: no rating is claimed.
            CHECK_FALSE(similar[k].contains("rating"));
        }
    }
    // A visitor's why names the ratings they gave.
    auto v = post(*c, "/v1/recommendations", "/v1/recommendations",
                  json{{"ratings", json::array({{{"item", "sku-00010"}, {"rating", 5.0}}, {{"item", "sku-00011"}, {"rating", 2}}})},
                       {"n", 10}}.dump());
    INFO(v.text);
    REQUIRE(v.status == 200);
    size_t with_rating = 0;
    for (const auto& entry : v.body["items"])
        for (const auto& s : entry["why"]["similar_rated"]) {
            const std::string id = s["item"];
            REQUIRE((id == "sku-00010" || id == "sku-00011"));
            CHECK(s["rating"].get<double>() == (id == "sku-00010" ? 5.0 : 2.0));
            ++with_rating;
        }
    CHECK(with_rating > 0);
}

TEST_CASE("unknown query parameters and body keys answer 400 listing the known ones; interval= names level") {
    auto& f = fixture();
    auto c = f.server->client();
    const std::string base = user_path("cust-00001");
    auto typo = get(*c, kUserRoute, base + "?rank-by=upper");
    require_problem(typo, 400);
    CHECK(typo.body["detail"].get<std::string>().find("rank-by") != std::string::npos);
    CHECK(typo.body["detail"].get<std::string>().find("rank_by, level") != std::string::npos);
    auto old = get(*c, kUserRoute, base + "?interval=0.8");
    require_problem(old, 400);
    CHECK(old.body["detail"].get<std::string>().find("level") != std::string::npos);
    for (const char* bad : {"?level=1.5", "?level=0", "?level=high", "?level="}) {
        INFO(bad);
        require_problem(get(*c, kUserRoute, base + bad), 400);
    }
    auto body = post(*c, "/v1/recommendations", "/v1/recommendations", R"({"n": 3, "interval": 0.8})");
    require_problem(body, 400);
    CHECK(body.body["detail"].get<std::string>().find("level") != std::string::npos);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"nn": 3})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations",
                         R"({"ratings":[{"item":"sku-00001","rating":3,"stars":3}]})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions",
                         R"({"pairs":[{"user":"cust-00001","item":"sku-00001"}],"levle":0.8})"), 400);
    require_problem(post(*c, "/v1/predictions", "/v1/predictions",
                         R"({"pairs":[{"user":"cust-00001","item":"sku-00001","rating":4}]})"), 400);
    require_problem(get(*c, "/v1/items", "/v1/items?sort=mean"), 400);
    require_problem(get(*c, "/v1/items/{item}", "/v1/items/sku-00001?n=3"), 400);
    require_problem(get(*c, "/v1/items/{item}/similar", "/v1/items/sku-00001/similar?count=3"), 400);
    // Known parameters still work.
    CHECK(get(*c, kUserRoute, base + "?level=0.5&n=2").status == 200);
}

TEST_CASE("routes that take no query parameters refuse one, naming none as accepted") {
    auto& f = fixture();
    auto c = f.server->client();
    for (const char* path : {"/v1/health?verbose=1", "/v1/ready?x=1", "/v1/model?full=1", "/metrics?x=1",
                             "/v1/openapi.json?format=yaml"}) {
        INFO(path);
        const std::string route = std::string(path).substr(0, std::string(path).find('?'));
        auto answer = get(*c, route, path);
        require_problem(answer, 400);
        CHECK(answer.body["detail"].get<std::string>().find("accepts: none") != std::string::npos);
    }
    require_problem(post(*c, "/v1/predictions", "/v1/predictions?level=0.8",
                         R"({"pairs":[{"user":"cust-00001","item":"sku-00001"}]})"),
                    400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations?n=3", R"({"n": 3})"), 400);
    // A JSON body sent as a form (curl -d without a Content-Type) is still a
    // body, not a query parameter.
    auto form = c->Post("/v1/recommendations", R"({"n": 2})", "application/x-www-form-urlencoded");
    REQUIRE(form);
    CHECK(form->status == 200);
    // The console's pages ignore query strings (a browser adds them freely).
    auto page = c->Get("/?from=bookmark");
    REQUIRE(page);
    CHECK(page->status == 200);
}

TEST_CASE("a category narrows the top-N to its products, as the offline engine does, and names come beside ids") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    RecommendOptions o;
    o.n = 5;
    std::vector<uint32_t> pantry;
    for (uint32_t i = 0; i < p.num_items; ++i)
        if (p.item_category(i) == "pantry") pantry.push_back(i);
    o.candidates = pantry;
    const auto want = f.engine->recommend(0, o);
    auto a = get(*c, kUserRoute, user_path(p.user_ids[0]) + "?n=5&category=pantry");
    INFO(a.text);
    REQUIRE(a.status == 200);
    REQUIRE(a.body["items"].size() == want.size());
    for (size_t k = 0; k < want.size(); ++k) {
        const auto& item = a.body["items"][k];
        CHECK(item["item"] == p.item_ids[want[k].item]);
        CHECK(item["category"] == "pantry");
        CHECK(item["name"] == "Thimbleford piece " + std::to_string(want[k].item));
    }
    auto unknown = get(*c, kUserRoute, user_path(p.user_ids[0]) + "?category=lighting");
    require_problem(unknown, 400);
    CHECK(unknown.body["detail"].get<std::string>().find("kitchen") != std::string::npos);
}

TEST_CASE("bad recommendation requests get problem documents") {
    auto& f = fixture();
    auto c = f.server->client();
    const std::string base = user_path("cust-00001");
    require_problem(get(*c, kUserRoute, user_path("cust-stranger")), 404);
    require_problem(get(*c, kUserRoute, base + "?n=0"), 400);
    require_problem(get(*c, kUserRoute, base + "?n=101"), 400);
    require_problem(get(*c, kUserRoute, base + "?n=ten"), 400);
    require_problem(get(*c, kUserRoute, base + "?rank_by=luck"), 400);
    require_problem(get(*c, kUserRoute, base + "?level=1.5"), 400);
    require_problem(get(*c, kUserRoute, base + "?exclude_rated=maybe"), 400);
    require_problem(get(*c, kUserRoute, base + "?items=sku-missing"), 404);
    require_problem(get(*c, kUserRoute, "/v1/users/cust-00001/wishlist"), 404);
    require_problem(get(*c, kUserRoute, "/v1/users/cust%zz/recommendations"), 400);
}

TEST_CASE("visitor fold-in matches the offline exact fold-in for every ranking, and identical requests get identical bytes") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    const std::vector<VisitorRating> ratings = {{10, 5.0}, {11, 1.5}, {5, 4.0}};
    const json rated = json::array({{{"item", "sku-00010"}, {"rating", 5.0}},
                                    {{"item", "sku-00011"}, {"rating", 1.5}},
                                    {{"item", kOddItem}, {"rating", 4}}});
    for (const char* rank_by : {"mean", "lower", "upper", "draw"}) {
        INFO(rank_by);
        RecommendOptions o;
        o.n = 6;
        o.level = 0.8;
        o.rank_by = server::parse_rank_by(rank_by);
        o.draw_seed = 18446744073709551557ull;  // beyond 2^53: only a string carries it intact
        const auto want = recommend_for_visitor(*f.engine, ratings, o);
        json req = {{"ratings", rated}, {"n", 6}, {"level", 0.8}, {"rank_by", rank_by}};
        if (o.rank_by == RankBy::draw) req["seed"] = "18446744073709551557";
        auto a = post(*c, "/v1/recommendations", "/v1/recommendations", req.dump());
        INFO(a.text);
        REQUIRE(a.status == 200);
        REQUIRE(a.body["items"].size() == want.size());
        for (size_t k = 0; k < want.size(); ++k) {
            CHECK(a.body["items"][k]["item"] == p.item_ids[want[k].item]);
            CHECK(a.body["items"][k]["rank_value"].get<double>() == want[k].rank_value);
            CHECK(a.body["items"][k]["rank_value_unclipped"].get<double>() == want[k].score);
            require_same_prediction(a.body["items"][k], want[k].prediction);
        }
        // Deterministic: a second identical request gets the same bytes.
        CHECK(post(*c, "/v1/recommendations", "/v1/recommendations", req.dump()).text == a.text);
        if (o.rank_by == RankBy::draw) {
            CHECK(a.body["seed"] == "18446744073709551557");
        } else {
            CHECK_FALSE(a.body.contains("seed"));
        }
    }
    // Without a seed, a draw ranking gets a fresh one and says which, as a
    // string that reproduces the answer; an integer seed is accepted too.
    auto fresh = post(*c, "/v1/recommendations", "/v1/recommendations",
                      json({{"ratings", rated}, {"rank_by", "draw"}}).dump());
    REQUIRE(fresh.status == 200);
    REQUIRE(fresh.body["seed"].is_string());
    const auto again = post(*c, "/v1/recommendations", "/v1/recommendations",
                            json({{"ratings", rated}, {"rank_by", "draw"}, {"seed", fresh.body["seed"]}}).dump());
    CHECK(again.body["items"] == fresh.body["items"]);
    const auto as_integer = post(*c, "/v1/recommendations", "/v1/recommendations",
                                 json({{"ratings", rated}, {"rank_by", "draw"}, {"seed", 77}}).dump());
    REQUIRE(as_integer.status == 200);
    CHECK(as_integer.body["seed"] == "77");
    // No ratings at all is a valid (prior) visitor.
    auto cold = post(*c, "/v1/recommendations", "/v1/recommendations", R"({"n": 3})");
    REQUIRE(cold.status == 200);
    CHECK(cold.body["items"].size() == 3);

    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations",
                         R"({"ratings":[{"item":"sku-ghost","rating":3}]})"), 404);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations",
                         R"({"ratings":[{"item":"sku-00001","rating":9}]})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations",
                         R"({"ratings":[{"item":"sku-00001","rating":3},{"item":"sku-00001","rating":4}]})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"n": -2})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"rank_by": "draw", "seed": "abc"})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"rank_by": "draw", "seed": -4})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"rank_by": "draw", "seed": 1.5})"), 400);
    // A malformed seed is refused even when the ranking does not use it.
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", R"({"seed": "abc"})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations",
                         R"({"seed": "99999999999999999999999"})"), 400);
    require_problem(post(*c, "/v1/recommendations", "/v1/recommendations", "nope"), 400);
}

TEST_CASE("item detail and lists agree with direct computation") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    const uint32_t S = p.num_samples, U = p.num_users, I = p.num_items, K = p.rank;
    // Direct: each customer's predictive mean (clipped) and sd for the item,
    // as the engine answers them, averaged over the customers; and the
    // posterior sd of each factor coordinate by plain loops in double.
    auto direct = [&](uint32_t i) {
        double mean = 0, sd = 0;
        for (uint32_t u = 0; u < U; ++u) {
            const Prediction pred = f.engine->predict(u, i, 0.9);
            mean += pred.mean / U;
            sd += pred.sd / U;
        }
        return std::pair{mean, sd};
    };
    std::vector<uint32_t> counts(I, 0);
    for (uint32_t i : p.rated_items) ++counts[i];
    for (uint32_t i : {0u, 5u, 6u, 77u}) {
        auto a = get(*c, "/v1/items/{item}", "/v1/items/" + url_encode(p.item_ids[i]));
        INFO(p.item_ids[i] << " " << a.text);
        REQUIRE(a.status == 200);
        CHECK(a.body["item"] == p.item_ids[i]);
        CHECK(a.body["rating_count"] == counts[i]);
        const auto [mean, sd] = direct(i);
        // The server forms per-sample means from float products, the engine
        // in double: agreement to 1e-5 relative.
        CHECK(a.body["mean"].get<double>() == Approx(mean).epsilon(1e-5));
        CHECK(a.body["sd"].get<double>() == Approx(sd).epsilon(1e-5));
        for (uint32_t k = 0; k < K; ++k) {
            double s1 = 0, s2 = 0;
            for (uint32_t s = 0; s < S; ++s) {
                s1 += p.item_factor(s, i)[k];
                s2 += double(p.item_factor(s, i)[k]) * p.item_factor(s, i)[k];
            }
            CHECK(a.body["factor_mean"][k].get<double>() == Approx(s1 / S).epsilon(1e-6));
            CHECK(a.body["factor_sd"][k].get<double>() == Approx(std::sqrt(s2 / S - (s1 / S) * (s1 / S))).epsilon(1e-4));
        }
    }
    require_problem(get(*c, "/v1/items/{item}", "/v1/items/sku-ghost"), 404);

    auto popular = get(*c, "/v1/items", "/v1/items?order=popularity&n=15");
    REQUIRE(popular.status == 200);
    REQUIRE(popular.body["items"].size() == 15);
    for (size_t k = 1; k < 15; ++k)
        CHECK(popular.body["items"][k - 1]["rating_count"] >= popular.body["items"][k]["rating_count"]);
    CHECK(popular.body["items"][0]["rating_count"] == *std::max_element(counts.begin(), counts.end()));
    for (const char* order : {"uncertainty", "mean"}) {
        const std::string key = std::string(order) == "mean" ? "mean" : "sd";
        auto list = get(*c, "/v1/items", std::string("/v1/items?n=100&order=") + order);
        REQUIRE(list.status == 200);
        REQUIRE(list.body["items"].size() == 100);
        for (size_t k = 1; k < 100; ++k) CHECK(list.body["items"][k - 1][key] >= list.body["items"][k][key]);
    }
    CHECK(get(*c, "/v1/items", "/v1/items").body["items"].size() == 20);
    require_problem(get(*c, "/v1/items", "/v1/items?order=price"), 400);
    auto garden = get(*c, "/v1/items", "/v1/items?order=uncertainty&n=100&category=garden");
    INFO(garden.text);
    REQUIRE(garden.status == 200);
    CHECK(garden.body["items"].size() == 40);  // every third of the 120 products
    for (const auto& item : garden.body["items"]) CHECK(item["category"] == "garden");
    require_problem(get(*c, "/v1/items", "/v1/items?category=lighting"), 400);
    require_problem(get(*c, "/v1/items", "/v1/items?n=1000"), 400);
}

TEST_CASE("similar items are ranked by per-sample cosine averaged over samples") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    for (uint32_t target : {6u, 30u}) {
        std::vector<std::pair<double, uint32_t>> want;
        for (uint32_t i = 0; i < I; ++i) {
            if (i == target) continue;
            double total = 0;
            for (uint32_t s = 0; s < S; ++s) {
                double dot = 0, na = 0, nb = 0;
                for (uint32_t k = 0; k < K; ++k) {
                    const double a = p.item_factor(s, target)[k], b = p.item_factor(s, i)[k];
                    dot += a * b;
                    na += a * a;
                    nb += b * b;
                }
                total += dot / std::sqrt(na * nb);
            }
            want.emplace_back(-total / S, i);
        }
        std::sort(want.begin(), want.end());
        auto a = get(*c, "/v1/items/{item}/similar", "/v1/items/" + url_encode(p.item_ids[target]) + "/similar?n=5");
        INFO(a.text);
        REQUIRE(a.status == 200);
        REQUIRE(a.body["items"].size() == 5);
        for (size_t k = 0; k < 5; ++k) {
            // float scoring vs double here: near-ties could swap, so compare scores, not just ids.
            CHECK(a.body["items"][k]["similarity"].get<double>() == Approx(-want[k].first).margin(1e-5));
        }
        CHECK(a.body["items"][0]["item"] == p.item_ids[want[0].second]);
    }
    require_problem(get(*c, "/v1/items/{item}/similar", "/v1/items/sku-ghost/similar"), 404);
    require_problem(get(*c, "/v1/items/{item}/similar", "/v1/items/sku-00001/similar?n=0"), 400);
}

TEST_CASE("admin reload needs the token, stays inside the model directory and survives bad files") {
    auto& f = fixture();
    auto c = f.server->client();
    const std::string before = get(*c, "/v1/model", "/v1/model").body["model"];
    const auto bearer = httplib::Headers{{"Authorization", "Bearer " + kToken}};
    require_problem(post(*c, "/v1/admin/reload", "/v1/admin/reload", ""), 401);
    require_problem(post(*c, "/v1/admin/reload", "/v1/admin/reload", "", {{"Authorization", "Bearer wrong"}}), 403);
    require_problem(post(*c, "/v1/admin/reload", "/v1/admin/reload", R"({"path":"/etc/passwd"})", bearer), 403);
    require_problem(post(*c, "/v1/admin/reload", "/v1/admin/reload", R"({"path":"../elsewhere.posterior"})", bearer), 403);
    auto broken = post(*c, "/v1/admin/reload", "/v1/admin/reload",
                       json{{"path", f.corrupt_path.filename().string()}}.dump(), bearer);
    require_problem(broken, 422);
    CHECK(get(*c, "/v1/model", "/v1/model").body["model"] == before);
    // The operator reads why in the event log too, not only in the answer.
    const std::string log = f.server->log();
    const size_t failed = log.find("broken.posterior over HTTP failed, still serving the previous model");
    CHECK(failed != std::string::npos);
    if (failed != std::string::npos) {
        const size_t line_start = log.rfind('\n', failed) + 1;  // npos + 1 == 0 for the first line
        CHECK(log.substr(line_start, failed - line_start).find("credence.serve") != std::string::npos);
    }
    require_problem(post(*c, "/v1/admin/reload", "/v1/admin/reload?force=1", "", bearer), 400);

    auto swap = post(*c, "/v1/admin/reload", "/v1/admin/reload", json{{"path", f.other_path.string()}}.dump(), bearer);
    INFO(swap.text);
    REQUIRE(swap.status == 200);
    CHECK(swap.body["previous"] == before);
    CHECK(swap.body["model"] != before);
    CHECK(get(*c, "/v1/model", "/v1/model").body["model"] == swap.body["model"]);
    auto back = post(*c, "/v1/admin/reload", "/v1/admin/reload", json{{"path", "shop.posterior"}}.dump(), bearer);
    REQUIRE(back.status == 200);
    CHECK(back.body["model"] == before);
}

TEST_CASE("the model description names no customer and no file path") {
    auto& f = fixture();
    auto c = f.server->client();
    auto model = get(*c, "/v1/model", "/v1/model");
    REQUIRE(model.status == 200);
    CHECK_FALSE(model.body.contains("source"));
    CHECK(model.text.find(f.dir.string()) == std::string::npos);
    CHECK(model.text.find("shop.posterior") == std::string::npos);
    for (const auto& id : f.posterior->user_ids) {
        INFO(id);
        CHECK(model.text.find("\"" + id + "\"") == std::string::npos);
    }
}

TEST_CASE("/v1/model shows a fit's held-out figures but not where its ratings or its warm start came from") {
    auto& f = fixture();
    auto c = f.server->client();
    const auto bearer = httplib::Headers{{"Authorization", "Bearer " + kToken}};
    // A refreshed model: read from a database, warm-started from a file,
    // checked on held-out ratings.
    Posterior p = *f.posterior;
    p.fit_metadata_json = json{{"data", {{"source", "postgresql://reader@db.thimbleford.internal/shop"},
                                         {"query", "SELECT * FROM ratings WHERE customer_id <> 'cust-00001'"},
                                         {"kept", 480}}},
                               {"start", {{"kind", "warm"}, {"from", "/srv/models/last-night.posterior"},
                                          {"customers_new", 3}}},
                               {"validation", {{"kind", "holdout"},
                                               {"figures", {{"ratings", 48}, {"rmse", 0.81},
                                                            {"baseline", {{"kind", "product_mean"}, {"rmse", 0.97}}}}}}},
                               {"refit_on_all", {{"ratings", 528}}}}
                              .dump();
    const fs::path refreshed = f.dir / "refreshed.posterior";
    write_posterior(p, refreshed.string());
    REQUIRE(post(*c, "/v1/admin/reload", "/v1/admin/reload", json{{"path", refreshed.filename().string()}}.dump(), bearer)
                .status == 200);
    const auto model = get(*c, "/v1/model", "/v1/model");
    CHECK(model.body["validation"]["kind"] == "holdout");
    CHECK(model.body["validation"]["rmse"] == 0.81);
    CHECK(model.body["validation"]["baseline"]["rmse"] == 0.97);
    CHECK(model.body["validation"]["refit_on_all"] == true);
    CHECK(model.body["fit"]["start"]["kind"] == "warm");
    CHECK(model.body["fit"]["start"]["customers_new"] == 3);
    CHECK(model.text.find("last-night.posterior") == std::string::npos);
    CHECK(model.text.find("db.thimbleford.internal") == std::string::npos);
    CHECK(model.text.find("cust-00001") == std::string::npos);
    REQUIRE(post(*c, "/v1/admin/reload", "/v1/admin/reload", json{{"path", "shop.posterior"}}.dump(), bearer).status ==
            200);
}

TEST_CASE("admin forget drops a customer's own factors at once, and they stay out after a reload") {
    auto& f = fixture();
    auto c = f.server->client();
    const Posterior& p = *f.posterior;
    const uint32_t u = 9;
    const std::string customer = p.user_ids[u];
    const auto bearer = httplib::Headers{{"Authorization", "Bearer " + kToken}};
    REQUIRE(get(*c, kUserRoute, user_path(customer)).status == 200);
    require_problem(post(*c, "/v1/admin/forget", "/v1/admin/forget", json{{"customer", customer}}.dump()), 401);
    require_problem(post(*c, "/v1/admin/forget", "/v1/admin/forget", "{}", bearer), 400);

    auto gone = post(*c, "/v1/admin/forget", "/v1/admin/forget", json{{"customer", customer}}.dump(), bearer);
    INFO(gone.text);
    REQUIRE(gone.status == 200);
    CHECK(gone.body["customer_found"] == true);
    CHECK(gone.body["rated_items_removed"] == p.rated_by(u).size());
    CHECK(gone.body["complete_after_refit"] == true);
    CHECK(gone.body["model"] != gone.body["previous"]);
    require_problem(get(*c, kUserRoute, user_path(customer)), 404);
    auto model = get(*c, "/v1/model", "/v1/model");
    CHECK(model.body["data"]["customers"] == p.num_users - 1);
    CHECK(model.body["data"]["products"] == p.num_items);
    // Others are answered from the same item samples as before.
    RecommendOptions o;
    o.n = 5;
    const auto want = f.engine->recommend(u + 1, o);
    auto other = get(*c, kUserRoute, user_path(p.user_ids[u + 1]) + "?n=5");
    REQUIRE(other.status == 200);
    for (size_t k = 0; k < want.size(); ++k) require_same_prediction(other.body["items"][k], want[k].prediction);

    // A reload of the unchanged file keeps the customer out; forgetting again is harmless.
    REQUIRE(post(*c, "/v1/admin/reload", "/v1/admin/reload", "", bearer).status == 200);
    require_problem(get(*c, kUserRoute, user_path(customer)), 404);
    auto again = post(*c, "/v1/admin/forget", "/v1/admin/forget", json{{"customer", customer}}.dump(), bearer);
    REQUIRE(again.status == 200);
    CHECK(again.body["customer_found"] == false);
}

TEST_CASE("API tokens: permissions per route, no customer's history to a token without customers, rotation") {
    auto& f = fixture();
    const fs::path dir = scratch_dir("server_http_tokens");
    const std::string shop = "shop-web-secret-0123456789abcdef0123456789";
    const std::string widget = "widget-secret-0123456789abcdef0123456789ab";
    const std::string ops = "ops-secret-0123456789abcdef0123456789abcde";
    std::ofstream(dir / "tokens") << "shop-web read,customers " << shop << "\nwidget read " << widget
                                  << "\nops metrics " << ops << "\n";
    ServerProcess server(dir, f.model_path,
                         "read_auth = \"required\"\napi_tokens_file = \"" + (dir / "tokens").string() + "\"\n");
    auto c = server.client();
    const auto as = [](const std::string& token) { return httplib::Headers{{"Authorization", "Bearer " + token}}; };
    const auto get_as = [&](const std::string& pattern, const std::string& target, const std::string& token) {
        return to_answer(c->Get(target.c_str(), as(token)), "get", pattern);
    };
    CHECK(get(*c, "/v1/health", "/v1/health").status == 200);
    CHECK(get(*c, "/v1/ready", "/v1/ready").status == 200);
    CHECK(get(*c, "/v1/openapi.json", "/v1/openapi.json").status == 200);

    auto anonymous = c->Get("/v1/model");
    REQUIRE(anonymous);
    CHECK(anonymous->status == 401);
    CHECK(anonymous->get_header_value("WWW-Authenticate").rfind("Bearer", 0) == 0);
    answered_routes().insert({"get", "/v1/model", 401});
    require_problem(get_as("/v1/model", "/v1/model", "not-a-valid-token-at-all"), 401);
    CHECK(get_as("/v1/model", "/v1/model", widget).status == 200);
    CHECK(get_as("/v1/items", "/v1/items?n=3", widget).status == 200);
    CHECK(to_answer(c->Post("/v1/recommendations", as(widget), R"({"n": 3})", "application/json"), "post",
                    "/v1/recommendations")
              .status == 200);

    // Without the customers permission, a known and an unknown customer get
    // the same refusal: nothing tells who is a customer or what they rated.
    const auto known = get_as(kUserRoute, user_path("cust-00001") + "?exclude_rated=false", widget);
    const auto unknown = get_as(kUserRoute, user_path("cust-stranger") + "?exclude_rated=false", widget);
    require_problem(known, 403);
    require_problem(unknown, 403);
    CHECK(known.body["detail"] == unknown.body["detail"]);
    CHECK(known.body["type"] == unknown.body["type"]);
    require_problem(get_as(kUserRoute, user_path("cust-00001") + "?items=sku-00002", widget), 403);
    require_problem(to_answer(c->Post("/v1/predictions", as(widget),
                                      R"({"pairs":[{"user":"cust-00001","item":"sku-00002"}]})", "application/json"),
                              "post", "/v1/predictions"),
                    403);
    CHECK(get_as(kUserRoute, user_path("cust-00001"), shop).status == 200);
    require_problem(get_as(kUserRoute, user_path("cust-stranger"), shop), 404);

    require_problem(get_as("/metrics", "/metrics", widget), 403);
    CHECK(get_as("/metrics", "/metrics", ops).status == 200);
    require_problem(get_as("/metrics", "/metrics", ""), 401);

    // Rotation: a new secret for the widget, read on SIGHUP; the old one stops working.
    const std::string rotated = "widget-rotated-0123456789abcdef0123456789";
    std::ofstream(dir / "tokens") << "shop-web read,customers " << shop << "\nwidget-2 read " << rotated << "\n";
    server.signal(SIGHUP);
    int status_old = 0, status_new = 0;
    for (int k = 0; k < 100 && !(status_old == 401 && status_new == 200); ++k) {
        std::this_thread::sleep_for(std::chrono::milliseconds(50));
        status_old = c->Get("/v1/model", as(widget))->status;
        status_new = c->Get("/v1/model", as(rotated))->status;
    }
    CHECK(status_old == 401);
    CHECK(status_new == 200);
}

TEST_CASE("metrics are Prometheus text with requests, latency, in-flight and model") {
    auto& f = fixture();
    auto c = f.server->client();
    get(*c, "/v1/health", "/v1/health");
    require_problem(get(*c, "", "/v1/nowhere"), 404);
    auto r = c->Get("/metrics");
    REQUIRE(r);
    REQUIRE(r->status == 200);
    answered_routes().insert({"get", "/metrics", 200});
    CHECK(r->get_header_value("Content-Type").rfind("text/plain; version=0.0.4", 0) == 0);
    const std::string& text = r->body;
    CHECK(text.find("credence_http_requests_total{route=\"/v1/health\",status=\"200\"}") != std::string::npos);
    CHECK(text.find("credence_http_requests_total{route=\"unmatched\",status=\"404\"}") != std::string::npos);
    CHECK(text.find("credence_http_request_duration_seconds_bucket{route=\"/v1/health\",le=\"+Inf\"}") != std::string::npos);
    CHECK(text.find("# TYPE credence_http_request_duration_seconds histogram") != std::string::npos);
    // This very request is in flight while the page is rendered.
    CHECK(text.find("credence_http_requests_in_flight 1\n") != std::string::npos);
    const std::string fingerprint = get(*c, "/v1/model", "/v1/model").body["model"];
    CHECK(text.find("credence_model_info{fingerprint=\"" + fingerprint + "\"") != std::string::npos);
    CHECK(text.find("credence_model_load_seconds ") != std::string::npos);
    // Every sample line is "name{labels} value" or "name value" with a numeric value.
    std::istringstream lines(text);
    std::string line;
    while (std::getline(lines, line)) {
        if (line.empty() || line[0] == '#') continue;
        const auto space = line.rfind(' ');
        REQUIRE(space != std::string::npos);
        INFO(line);
        CHECK_NOTHROW(std::stod(line.substr(space + 1)));
    }
}

TEST_CASE("every route and status the server answered is described in openapi.json") {
    auto& f = fixture();
    auto c = f.server->client();
    auto served = get(*c, "/v1/openapi.json", "/v1/openapi.json");
    REQUIRE(served.status == 200);
    std::ifstream in(source_dir() / "server" / "openapi.json");
    const json doc = json::parse(in);
    CHECK(served.body == doc);
    REQUIRE(doc.contains("openapi"));
    REQUIRE(doc.contains("paths"));
    CHECK(doc.at("openapi").get<std::string>().rfind("3.1", 0) == 0);
    const json& paths = doc.at("paths");
    size_t checked = 0;
    for (const auto& [method, pattern, status] : answered_routes()) {
        if (pattern.empty()) continue;  // deliberately unknown routes
        INFO(method << " " << pattern << " " << status);
        REQUIRE(paths.contains(pattern));
        REQUIRE(paths.at(pattern).contains(method));
        CHECK(paths.at(pattern).at(method).at("responses").contains(std::to_string(status)));
        ++checked;
    }
    // Each route answered at least once when the whole file runs.
    CHECK(checked > 0);
}

TEST_CASE("the server's start-up log names the CPU level its kernels run at") {
    auto& f = fixture();
    const std::string log = f.server->log();
    INFO(log);
    CHECK(log.find("kernels " + credence::cpu_level_description()) != std::string::npos);
}
