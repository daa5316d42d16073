// Tests for the prediction engine (model/predict/predict.cpp) and its exact pruned
// top-n selection (model/predict/top_n.hpp): every answer is compared with a direct,
// brute-force computation from the sample arrays.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <limits>
#include <memory>
#include <stdexcept>
#include <vector>

#include "model/error.hpp"
#include "model/predict/predict.hpp"
#include "model/math/random.hpp"
#include "model/predict/top_n.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

std::shared_ptr<const Posterior> simulated(const SimulatedPosteriorOptions& options) {
    return std::make_shared<const Posterior>(simulate_posterior(options));
}

// m_s written out from the arrays, independently of the engine.
std::vector<double> direct_means(const Posterior& p, uint32_t u, uint32_t i) {
    std::vector<double> m(p.num_samples);
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        double v = p.global_mean;
        if (p.has_biases) v += p.user_bias[s * p.num_users + u] + double(p.item_bias[s * p.num_items + i]);
        for (uint32_t k = 0; k < p.rank; ++k)
            v += double(p.user_factors[(size_t(s) * p.num_users + u) * p.rank + k]) *
                 p.item_factors[(size_t(s) * p.num_items + i) * p.rank + k];
        m[s] = v;
    }
    return m;
}

// Plain bisection on the mixture CDF (written with std::erfc), 200 halvings.
double bisect_quantile(const std::vector<double>& m, const std::vector<float>& tau, double p) {
    auto cdf = [&](double x) {
        double c = 0;
        for (size_t s = 0; s < m.size(); ++s) c += 0.5 * std::erfc(-(x - m[s]) * std::sqrt(double(tau[s]) / 2.0));
        return c / m.size();
    };
    double lo = -1e3, hi = 1e3;
    for (int i = 0; i < 200; ++i) (cdf(0.5 * (lo + hi)) < p ? lo : hi) = 0.5 * (lo + hi);
    return 0.5 * (lo + hi);
}

struct Ranked {
    uint32_t item;
    double score;
};

// Brute force: score every pool item, sort, keep n. `score` maps m_s to a score.
template <class Score>
std::vector<Ranked> brute_force(const Posterior& p, uint32_t user, const RecommendOptions& o, Score score) {
    std::vector<uint32_t> pool;
    if (o.candidates) {
        pool = *o.candidates;
        std::sort(pool.begin(), pool.end());
        pool.erase(std::unique(pool.begin(), pool.end()), pool.end());
    } else {
        for (uint32_t i = 0; i < p.num_items; ++i) pool.push_back(i);
    }
    const auto rated = p.rated_by(user);
    std::vector<Ranked> all;
    for (uint32_t i : pool) {
        if (o.exclude_rated && std::binary_search(rated.begin(), rated.end(), i)) continue;
        all.push_back({i, score(direct_means(p, user, i))});
    }
    std::sort(all.begin(), all.end(), [](const Ranked& a, const Ranked& b) {
        return a.score > b.score || (a.score == b.score && a.item < b.item);
    });
    if (all.size() > o.n) all.resize(o.n);
    return all;
}

bool same_ranking(const std::vector<Recommendation>& got, const std::vector<Ranked>& want) {
    if (got.size() != want.size()) return false;
    for (size_t j = 0; j < got.size(); ++j) {
        if (got[j].item != want[j].item) return false;
        if (std::abs(got[j].score - want[j].score) > 1e-9 * (1 + std::abs(want[j].score))) return false;
    }
    return true;
}

}  // namespace

TEST_CASE("predict matches a direct computation from the sample arrays") {
    SimulatedPosteriorOptions opt{.users = 15, .items = 25, .rank = 3, .samples = 40, .chains = 2, .seed = 11};
    opt.global_mean = 4.6f;  // pushes some means and bounds past the scale maximum 5
    const auto post = simulated(opt);
    const PredictionEngine engine(post);
    const auto& tau = post->noise_precision;
    int clipped_means = 0, clipped_uppers = 0;
    for (uint32_t u = 0; u < post->num_users; ++u)
        for (uint32_t i = 0; i < post->num_items; ++i) {
            const auto m = direct_means(*post, u, i);
            std::vector<double> engine_m;
            engine.sample_means(u, i, engine_m);
            REQUIRE(engine_m.size() == m.size());
            for (size_t s = 0; s < m.size(); ++s) CHECK(engine_m[s] == Approx(m[s]).margin(1e-12));
            // Mixture moments via E[X] and E[X^2] = mean(m^2 + 1/tau).
            double e1 = 0, e2 = 0;
            for (size_t s = 0; s < m.size(); ++s) {
                e1 += m[s];
                e2 += m[s] * m[s] + 1.0 / tau[s];
            }
            e1 /= m.size();
            e2 /= m.size();
            for (double level : {0.5, 0.9}) {
                const auto pr = engine.predict(u, i, level);
                CHECK(pr.mean == Approx(std::clamp(e1, 1.0, 5.0)).margin(1e-12));
                CHECK(pr.sd == Approx(std::sqrt(e2 - e1 * e1)).margin(1e-9));
                const double lo = bisect_quantile(m, tau, (1 - level) / 2);
                const double hi = bisect_quantile(m, tau, (1 + level) / 2);
                CHECK(pr.lower == Approx(std::clamp(lo, 1.0, 5.0)).margin(1e-9));
                CHECK(pr.upper == Approx(std::clamp(hi, 1.0, 5.0)).margin(1e-9));
                CHECK(pr.lower <= pr.upper);
                clipped_means += e1 > 5.0;
                clipped_uppers += hi > 5.0;
            }
        }
    // The clipping branch was exercised (and the unclipped one, by the rest).
    CHECK(clipped_means > 0);
    CHECK(clipped_uppers > 0);
    CHECK_THROWS_AS(engine.predict(0, 0, 0.0), OptionError);
    CHECK_THROWS_AS(engine.predict(0, 0, 1.0), OptionError);
    CHECK_THROWS_AS(engine.predict(0, 0, std::nan("")), OptionError);
}

TEST_CASE("recommend equals brute force for every ranking on random posteriors") {
    // Many shapes and seeds, with exact score ties (duplicated items), with
    // and without biases, candidate lists (unsorted, repeated) and rated-item
    // exclusion. Quantile scores agree to the solver tolerance (1e-9).
    int checked = 0;
    for (uint64_t seed = 1; seed <= 24; ++seed) {
        Rng shape_rng(seed);
        SimulatedPosteriorOptions opt;
        opt.users = 6;
        opt.items = 40 + static_cast<uint32_t>(shape_rng.below(400));
        opt.rank = 1 + static_cast<uint32_t>(shape_rng.below(8));
        opt.samples = 5 + static_cast<uint32_t>(shape_rng.below(50));
        opt.biases = seed % 3 != 0;
        opt.seed = 1000 + seed;
        opt.duplicate_items = 5;
        opt.jitter_sd = 0.05 + 0.4 * shape_rng.uniform();
        const auto post = simulated(opt);
        const PredictionEngine engine(post);
        const auto& tau = post->noise_precision;
        for (uint32_t user : {0u, 5u}) {
            for (int variant = 0; variant < 4; ++variant) {
                RecommendOptions o;
                o.n = std::vector<uint32_t>{1, 5, 17, 10000}[variant];
                o.exclude_rated = variant % 2 == 0;
                o.level = variant < 2 ? 0.9 : 0.5;
                if (variant == 1 || variant == 2) {
                    std::vector<uint32_t> c;
                    for (int j = 0; j < 30; ++j) c.push_back(static_cast<uint32_t>(shape_rng.below(opt.items)));
                    c.push_back(c.front());
                    c.push_back(opt.items - 1);  // a duplicated item
                    c.push_back(4);                // its twin
                    o.candidates = c;
                }
                INFO("seed " << seed << " user " << user << " variant " << variant);
                o.rank_by = RankBy::mean;
                CHECK(same_ranking(engine.recommend(user, o),
                                   brute_force(*post, user, o, [](const std::vector<double>& m) {
                                       return mixture_mean(m);
                                   })));
                o.rank_by = RankBy::lower;
                CHECK(same_ranking(engine.recommend(user, o),
                                   brute_force(*post, user, o, [&](const std::vector<double>& m) {
                                       return mixture_quantile(m, tau, (1 - o.level) / 2);
                                   })));
                o.rank_by = RankBy::upper;
                const auto upper = engine.recommend(user, o);
                CHECK(same_ranking(upper, brute_force(*post, user, o, [&](const std::vector<double>& m) {
                                       return mixture_quantile(m, tau, (1 + o.level) / 2);
                                   })));
                // Each item carries the same prediction predict() gives.
                for (const auto& r : upper) {
                    const auto pr = engine.predict(user, r.item, o.level);
                    CHECK(r.prediction.mean == pr.mean);
                    CHECK(r.prediction.sd == pr.sd);
                    CHECK(r.prediction.lower == pr.lower);
                    CHECK(r.prediction.upper == pr.upper);
                }
                // A draw ranks by one sample's means: some sample's brute force matches.
                o.rank_by = RankBy::draw;
                o.draw_seed = seed * 31 + variant;
                const auto drawn = engine.recommend(user, o);
                bool matched = false;
                for (uint32_t s = 0; s < opt.samples && !matched; ++s)
                    matched = same_ranking(drawn, brute_force(*post, user, o, [s](const std::vector<double>& m) {
                                               return m[s];
                                           }));
                CHECK(matched);
                ++checked;
            }
        }
    }
    CHECK(checked == 24 * 2 * 4);
}

TEST_CASE("recommend stays exact on a wide catalogue where pruning matters") {
    // 3,000 items and 60 samples: the realistic case the pruning is for.
    const auto post = simulated({.users = 3, .items = 3000, .rank = 8, .samples = 60, .chains = 2, .seed = 5150});
    const PredictionEngine engine(post);
    const auto& tau = post->noise_precision;
    for (RankBy by : {RankBy::mean, RankBy::lower, RankBy::upper}) {
        RecommendOptions o;
        o.n = 25;
        o.rank_by = by;
        const double prob = by == RankBy::lower ? 0.05 : 0.95;
        CHECK(same_ranking(engine.recommend(1, o), brute_force(*post, 1, o, [&](const std::vector<double>& m) {
                               return by == RankBy::mean ? mixture_mean(m) : mixture_quantile(m, tau, prob);
                           })));
    }
}

TEST_CASE("ties break by the lower item index") {
    // Two items with identical factors and biases in every sample score
    // identically under every ranking; the lower index must come first.
    SimulatedPosteriorOptions opt{.users = 2, .items = 40, .rank = 3, .samples = 20, .chains = 1, .seed = 3};
    opt.duplicate_items = 10;  // items 30..39 copy items 0..9
    opt.rated_fraction = 0.0;
    const auto post = simulated(opt);
    const PredictionEngine engine(post);
    for (RankBy by : {RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}) {
        RecommendOptions o;
        o.n = 2;
        o.rank_by = by;
        o.candidates = std::vector<uint32_t>{37, 7};
        const auto r = engine.recommend(0, o);
        REQUIRE(r.size() == 2);
        CHECK(r[0].item == 7);
        CHECK(r[1].item == 37);
        CHECK(r[0].score == r[1].score);
    }
}

TEST_CASE("rated items are excluded only when asked") {
    const auto post = simulated({.users = 4, .items = 60, .rank = 3, .samples = 10, .chains = 1,
                                 .seed = 8, .rated_fraction = 0.5});
    const PredictionEngine engine(post);
    RecommendOptions o;
    o.n = 60;
    const auto rated = post->rated_by(2);
    REQUIRE(!rated.empty());
    const auto without = engine.recommend(2, o);
    CHECK(without.size() == 60 - rated.size());
    for (const auto& r : without) CHECK(!std::binary_search(rated.begin(), rated.end(), r.item));
    o.exclude_rated = false;
    CHECK(engine.recommend(2, o).size() == 60);
    // Candidates that are all rated leave nothing to recommend.
    o.exclude_rated = true;
    o.candidates = std::vector<uint32_t>(rated.begin(), rated.end());
    CHECK(engine.recommend(2, o).empty());
}

TEST_CASE("a visitor with a known user's factors gets that user's recommendations") {
    for (bool biases : {true, false}) {
        const auto post = simulated({.users = 5, .items = 120, .rank = 4, .samples = 25, .chains = 1,
                                     .biases = biases, .seed = 21});
        const PredictionEngine engine(post);
        const uint32_t u = 3, S = post->num_samples, K = post->rank;
        std::vector<float> factors, bias;
        for (uint32_t s = 0; s < S; ++s) {
            const auto f = post->user_factor(s, u);
            factors.insert(factors.end(), f.begin(), f.end());
            bias.push_back(post->user_bias_of(s, u));
        }
        const auto rated = post->rated_by(u);
        for (RankBy by : {RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}) {
            RecommendOptions o;
            o.rank_by = by;
            o.draw_seed = 99;
            const auto a = engine.recommend(u, o);
            const auto b = engine.recommend_for_factors(factors, bias, rated, o);
            REQUIRE(a.size() == b.size());
            for (size_t j = 0; j < a.size(); ++j) {
                CHECK(a[j].item == b[j].item);
                CHECK(a[j].score == b[j].score);
                CHECK(a[j].prediction.upper == b[j].prediction.upper);
            }
        }
        CHECK_THROWS_AS(engine.recommend_for_factors(std::span(factors).first(K), bias, rated, {}),
                        std::invalid_argument);
    }
}

TEST_CASE("draw ranks items first as often as the posterior says they are better") {
    // Thompson sampling over the mean: item a comes first in the proportion of
    // samples where m_a,s beats m_b,s (ties to the lower index). N = 20,000
    // seeds; tolerance 5 binomial standard errors sqrt(q(1-q)/N), fixed seeds.
    SimulatedPosteriorOptions opt{.users = 3, .items = 30, .rank = 3, .samples = 200, .chains = 2, .seed = 404};
    opt.jitter_sd = 0.6;  // samples disagree a lot
    const auto post = simulated(opt);
    const PredictionEngine engine(post);
    const uint32_t user = 1;
    // Pick the pair whose posterior probability is nearest 1/2.
    uint32_t a = 0, b = 1;
    double q = 0, best = 2;
    for (uint32_t i = 0; i < 30; ++i)
        for (uint32_t j = i + 1; j < 30; ++j) {
            const auto mi = direct_means(*post, user, i), mj = direct_means(*post, user, j);
            int wins = 0;
            for (uint32_t s = 0; s < post->num_samples; ++s) wins += mi[s] >= mj[s];
            const double share = double(wins) / post->num_samples;
            if (std::abs(share - 0.5) < best) best = std::abs(share - 0.5), a = i, b = j, q = share;
        }
    REQUIRE(q > 0.2);
    REQUIRE(q < 0.8);
    RecommendOptions o;
    o.n = 1;
    o.rank_by = RankBy::draw;
    o.exclude_rated = false;
    o.candidates = std::vector<uint32_t>{a, b};
    const int N = 20000;
    int a_first = 0;
    for (int seed = 0; seed < N; ++seed) {
        o.draw_seed = static_cast<uint64_t>(seed);
        a_first += engine.recommend(user, o).at(0).item == a;
    }
    CHECK(std::abs(double(a_first) / N - q) < 5 * std::sqrt(q * (1 - q) / N));
}

TEST_CASE("recommend validates its options") {
    const auto post = simulated({.users = 2, .items = 10, .rank = 2, .samples = 5, .chains = 1, .seed = 1});
    const PredictionEngine engine(post);
    RecommendOptions o;
    o.n = 0;
    CHECK_THROWS_AS(engine.recommend(0, o), OptionError);
    o.n = 3;
    for (double bad : {0.0, 1.0, -0.5, 1.5, std::nan("")}) {
        o.level = bad;
        CHECK_THROWS_AS(engine.recommend(0, o), OptionError);
    }
    o.level = 0.8;
    o.candidates = std::vector<uint32_t>{1, 10};
    CHECK_THROWS_AS(engine.recommend(0, o), std::invalid_argument);
    o.candidates = std::vector<uint32_t>{1, 9};
    o.exclude_rated = false;
    CHECK(engine.recommend(0, o).size() == 2);  // n larger than the pool
}

TEST_CASE("top-n selection equals a full sort and skips hopeless candidates") {
    // Synthetic bounds with exact scores anywhere inside them (including on
    // the bounds and with repeated values), against sorting everything. Every
    // fifth seed gives no visiting estimate at all (correctness must not
    // depend on it) and a `below` test that never helps.
    for (uint64_t seed = 1; seed <= 20; ++seed) {
        Rng rng(seed);
        const size_t count = 5000;
        std::vector<ScoreBound> bounds(count);
        std::vector<double> exact(count);
        for (uint32_t i = 0; i < count; ++i) {
            const double centre = rng.normal(), half = 0.3 * rng.uniform();
            const double where = seed % 2 ? std::round(4 * rng.uniform()) / 2 - 1 : 2 * rng.uniform() - 1;
            exact[i] = seed % 4 == 3 ? std::round((centre + where * half) * 8) / 8 : centre + where * half;
            const double estimate = seed % 5 == 0 ? 0.0 : centre;
            bounds[i] = {i, std::min(exact[i], centre - half), std::max(exact[i], centre + half), estimate};
        }
        std::vector<ScoredItem> all;
        for (uint32_t i = 0; i < count; ++i) all.push_back({i, exact[i]});
        std::sort(all.begin(), all.end(), ranks_before);
        for (size_t n : {1, 10, 100}) {
            size_t evaluated = 0;
            // `below` answers from the exact score, as a valid cheap test may.
            const auto below = [&](uint32_t i, double t) { return seed % 5 != 0 && exact[i] < t; };
            const auto top = select_top_n(bounds, n, [&](uint32_t i) { return exact[i]; }, below, &evaluated);
            REQUIRE(top.size() == n);
            for (size_t j = 0; j < n; ++j) {
                CHECK(top[j].item == all[j].item);
                CHECK(top[j].score == all[j].score);
            }
            // Only candidates near the cut are scored exactly: with bound
            // half-widths below 0.3, far fewer than the 5,000 offered.
            if (seed % 5 != 0) CHECK(evaluated < count / 5);
        }
    }
}

namespace {

}  // namespace

TEST_CASE("a batch answers every request exactly as recommend does alone") {
    // Ranks 16 (the unrolled kernel) and 5 (the general one with a tail),
    // with and without biases; the batch mixes every ranking, levels, n,
    // dense and sparse candidate lists, exclusion on and off, and bad
    // requests, which must fail alone with recommend()'s exception.
    using Spec = SimulatedPosteriorOptions;
    for (Spec opt : {Spec{.users = 9, .items = 1300, .rank = 16, .samples = 24, .chains = 2},
                     Spec{.users = 9, .items = 700, .rank = 5, .samples = 31, .chains = 1, .biases = false}}) {
        opt.seed = 777 + opt.rank;
        opt.duplicate_items = 3;
        const auto post = simulated(opt);
        const PredictionEngine engine(post);
        Rng rng(opt.rank);
        std::vector<RecommendRequest> requests;
        for (uint32_t k = 0; k < 40; ++k) {
            RecommendRequest r;
            r.user = k % opt.users;
            r.options.rank_by = std::vector<RankBy>{RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}[k % 4];
            r.options.n = 1 + static_cast<uint32_t>(rng.below(30));
            r.options.level = 0.5 + 0.45 * rng.uniform();
            r.options.exclude_rated = k % 3 != 0;
            r.options.draw_seed = k;
            if (k % 5 == 1) {  // sparse: a few candidates
                std::vector<uint32_t> c;
                for (int j = 0; j < 12; ++j) c.push_back(static_cast<uint32_t>(rng.below(opt.items)));
                r.options.candidates = c;
            } else if (k % 5 == 2) {  // dense: most of the catalogue
                std::vector<uint32_t> c;
                for (uint32_t i = 0; i < opt.items; ++i)
                    if (i % 4 != 1) c.push_back(i);
                r.options.candidates = c;
            }
            requests.push_back(r);
        }
        requests[7].options.n = 0;
        requests[13].options.level = 1.5;
        requests[21].user = opt.users;  // beyond the model
        requests[22].options.candidates = std::vector<uint32_t>{0, opt.items};

        const auto answers = engine.recommend_batch(requests);
        REQUIRE(answers.size() == requests.size());
        for (size_t k = 0; k < requests.size(); ++k) {
            INFO("rank " << opt.rank << " request " << k);
            const auto& r = requests[k];
            if (k == 7 || k == 13) {
                CHECK_THROWS_AS(engine.recommend(r.user, r.options), OptionError);
                REQUIRE(answers[k].error);
                CHECK_THROWS_AS(std::rethrow_exception(answers[k].error), OptionError);
            } else if (k == 22) {
                CHECK_THROWS_AS(engine.recommend(r.user, r.options), std::invalid_argument);
                REQUIRE(answers[k].error);
                CHECK_THROWS_AS(std::rethrow_exception(answers[k].error), std::invalid_argument);
            } else if (k == 21) {
                CHECK_THROWS_AS(engine.recommend(r.user, r.options), std::out_of_range);
                REQUIRE(answers[k].error);
                CHECK_THROWS_AS(std::rethrow_exception(answers[k].error), std::out_of_range);
            } else {
                REQUIRE_FALSE(answers[k].error);
                CHECK(!answers[k].items.empty());
                CHECK((answers[k].items == engine.recommend(r.user, r.options)));
            }
        }
        // And one batched mean ranking against brute force, independently of the engine.
        const auto& first = requests[0];
        REQUIRE(first.options.rank_by == RankBy::mean);
        CHECK(same_ranking(answers[0].items, brute_force(*post, first.user, first.options,
                                                         [](const std::vector<double>& m) { return mixture_mean(m); })));
    }
}

TEST_CASE("a batch of one and an empty batch") {
    const auto post = simulated({.users = 3, .items = 200, .rank = 16, .samples = 10, .chains = 1, .seed = 99});
    const PredictionEngine engine(post);
    CHECK(engine.recommend_batch({}).empty());
    RecommendRequest r;
    r.user = 2;
    r.options.rank_by = RankBy::upper;
    const auto one = engine.recommend_batch(std::vector<RecommendRequest>{r});
    REQUIRE(one.size() == 1);
    CHECK((one[0].items == engine.recommend(2, r.options)));
}

#include "model/math/cpu_level.hpp"
#include "model/predict/screening.hpp"
#include "model/predict/screening_kernels.hpp"

namespace {
// Whether the active level's mean-only pass reads the half copy for this shape.
bool reads_halves(uint32_t viewers, uint32_t rank) {
    return screening_kernels::table_for(active_cpu_level()).reads_halves(viewers, rank);
}
}  // namespace

TEST_CASE("screened summaries stay within their stated slack of the reference means") {
    // The exactness of every ranking rests on this bound (model/predict/screening.cpp
    // derives it). Ranks 16 and 8 take the grouped float path for means (the
    // wide one where the CPU has it), 12 the four-lane one, 5 the per-sample
    // path; large factor scales make the rounding visible.
    for (const uint32_t rank : {16u, 12u, 8u, 5u}) {
        SimulatedPosteriorOptions opt{.users = 4, .items = 900, .rank = rank, .samples = 37, .chains = 1,
                                      .seed = 300 + rank};
        opt.factor_sd = 3.0;
        const auto post = simulated(opt);
        const Posterior& p = *post;
        const auto norms = max_item_norms(p);
        std::vector<double> shift(p.num_samples);
        for (uint32_t s = 0; s < p.num_samples; ++s) shift[s] = -1.3 / std::sqrt(double(p.noise_precision[s]));
        std::vector<ScreenJob> jobs(4);
        std::vector<ScreenJob*> pointers;
        for (uint32_t u = 0; u < 4; ++u) {
            jobs[u].viewer = known_user(p, u);
            if (u % 2) jobs[u].shift = shift;  // quantile jobs
            pointers.push_back(&jobs[u]);
        }
        screen_all_items(p, norms, pointers);
        double worst = 0.0;  // largest error relative to the slack
        for (uint32_t u = 0; u < 4; ++u) {
            const ScreenJob& job = jobs[u];
            REQUIRE(job.slack > 0.0);
            for (uint32_t i = 0; i < p.num_items; ++i) {
                const auto m = direct_means(p, u, i);
                worst = std::max(worst, std::abs(job.sum[i] / p.num_samples - mixture_mean(m)) / job.slack);
                if (!job.quantiles()) continue;
                double lo = std::numeric_limits<double>::infinity(), hi = -lo;
                for (uint32_t s = 0; s < p.num_samples; ++s) {
                    worst = std::max(worst, std::abs(double(job.rows[size_t(i) * p.num_samples + s]) - m[s]) / job.slack);
                    lo = std::min(lo, m[s] + shift[s]);
                    hi = std::max(hi, m[s] + shift[s]);
                }
                worst = std::max(worst, std::abs(job.lo[i] - lo) / job.slack);
                worst = std::max(worst, std::abs(job.hi[i] - hi) / job.slack);
            }
        }
        INFO("rank " << rank << ": largest error / slack " << worst);
        CHECK(worst <= 1.0);
        CHECK(worst > 0.0);  // the screened values really are approximations
    }
}

TEST_CASE("a mean-only pass over the half copy stays within its slack, which counts the halves' rounding") {
    // Mean rankings with one to three viewers read the item factors in half
    // precision where the CPU widens halves (model/predict/screening.cpp); the
    // slack adds |u| times each sample's largest rounding residual.
    for (const uint32_t rank : {16u, 32u}) {
        SimulatedPosteriorOptions opt{.users = 3, .items = 900, .rank = rank, .samples = 29, .chains = 1,
                                      .seed = 500 + rank};
        opt.factor_sd = 3.0;
        opt.bias_sd = 0.5;
        const auto post = simulated(opt);
        const Posterior& p = *post;
        const auto norms = max_item_norms(p);
        const ItemBiasTotals totals = item_bias_totals(p);
        const HalfItemBlocks half = half_item_blocks(p);
        REQUIRE(half.usable());
        REQUIRE(half.values.size() == size_t(p.num_samples) * p.num_items * rank);
        for (uint32_t s = 0; s < p.num_samples; ++s) CHECK(half.residual_norm[s] > 0.0);
        for (const uint32_t viewers : {1u, 3u}) {
            std::vector<ScreenJob> plain(viewers), halved(viewers);
            std::vector<ScreenJob*> plain_ptr, half_ptr;
            for (uint32_t u = 0; u < viewers; ++u) {
                plain[u].viewer = halved[u].viewer = known_user(p, u);
                plain_ptr.push_back(&plain[u]);
                half_ptr.push_back(&halved[u]);
            }
            screen_all_items(p, norms, plain_ptr, 2, &totals);
            screen_all_items(p, norms, half_ptr, 2, &totals, &half);
            double worst = 0.0;  // largest error relative to the slack
            for (uint32_t u = 0; u < viewers; ++u)
                for (uint32_t i = 0; i < p.num_items; ++i)
                    worst = std::max(worst, std::abs(halved[u].sum[i] / p.num_samples - mixture_mean(direct_means(p, u, i))) /
                                                halved[u].slack);
            INFO("rank " << rank << ", " << viewers << " viewer(s): largest error / slack " << worst);
            CHECK(worst <= 1.0);
            CHECK(worst > 0.0);
            // Where the halves were read the slack grew; elsewhere the pass read floats.
            if (reads_halves(viewers, rank))
                CHECK(halved[0].slack > plain[0].slack);
            else
                CHECK(halved[0].slack == plain[0].slack);
        }
    }
    SimulatedPosteriorOptions opt{.users = 2, .items = 50, .rank = 16, .samples = 5, .chains = 1, .seed = 9};
    auto post = simulated(opt);
    Posterior wide = *post;
    wide.item_factors[7] = 70000.0f;  // beyond half's range
    CHECK_FALSE(half_item_blocks(wide).usable());
    HalfItemBlocks wrong = half_item_blocks(*post);
    wrong.values.pop_back();
    std::vector<ScreenJob> one(1);
    one[0].viewer = known_user(*post, 0);
    std::vector<ScreenJob*> one_ptr{&one[0]};
    const auto norms = max_item_norms(*post);
    if (reads_halves(1, 16))
        CHECK_THROWS_AS(screen_all_items(*post, norms, one_ptr, 1, nullptr, &wrong), std::invalid_argument);
}

TEST_CASE("a pass given the item bias totals gives the same summaries as one reading the bias block") {
    // Mean-only passes (which then skip the bias block) and mixed passes
    // (which still read it for the quantile jobs), on 2 threads and 1.
    SimulatedPosteriorOptions opt{.users = 5, .items = 700, .rank = 16, .samples = 23, .chains = 1, .seed = 77};
    opt.bias_sd = 0.8;
    const auto post = simulated(opt);
    const Posterior& p = *post;
    REQUIRE(p.has_biases);
    const auto norms = max_item_norms(p);
    const ItemBiasTotals totals = item_bias_totals(p);
    REQUIRE(totals.sum.size() == p.num_items);
    std::vector<double> shift(p.num_samples);
    for (uint32_t s = 0; s < p.num_samples; ++s) shift[s] = 1.1 / std::sqrt(double(p.noise_precision[s]));
    for (const bool mixed : {false, true})
        for (const int threads : {1, 2}) {
            std::vector<ScreenJob> plain(5), given(5);
            std::vector<ScreenJob*> plain_ptr, given_ptr;
            for (uint32_t u = 0; u < 5; ++u) {
                plain[u].viewer = given[u].viewer = known_user(p, u);
                if (mixed && u == 2) plain[u].shift = given[u].shift = shift;
                plain_ptr.push_back(&plain[u]);
                given_ptr.push_back(&given[u]);
            }
            screen_all_items(p, norms, plain_ptr, threads);
            screen_all_items(p, norms, given_ptr, threads, &totals);
            INFO("mixed " << mixed << ", threads " << threads);
            for (uint32_t u = 0; u < 5; ++u) {
                CHECK(plain[u].sum == given[u].sum);
                CHECK(plain[u].slack == given[u].slack);
                CHECK(plain[u].lo == given[u].lo);
                CHECK(plain[u].hi == given[u].hi);
            }
        }
    ItemBiasTotals wrong = totals;
    wrong.sum.pop_back();
    std::vector<ScreenJob> one(1);
    one[0].viewer = known_user(p, 0);
    std::vector<ScreenJob*> one_ptr{&one[0]};
    CHECK_THROWS_AS(screen_all_items(p, norms, one_ptr, 1, &wrong), std::invalid_argument);
}

TEST_CASE("rank_value is the ranked number on the rating scale and with score explains the order") {
    // A scale narrow around the global mean makes many bounds and draws
    // pass its ends, so several items share rank_value there and only the
    // unclipped score can order them.
    SimulatedPosteriorOptions opt{.users = 3, .items = 80, .rank = 3, .samples = 20, .chains = 1, .seed = 77};
    Posterior narrow = *simulated(opt);
    narrow.scale.min = narrow.global_mean - 0.3f;
    narrow.scale.max = narrow.global_mean + 0.3f;
    const PredictionEngine engine(std::make_shared<const Posterior>(std::move(narrow)));
    const Posterior& p = engine.posterior();
    for (RankBy by : {RankBy::mean, RankBy::lower, RankBy::upper, RankBy::draw}) {
        INFO("rank_by " << int(by));
        RecommendOptions o;
        o.n = 40;
        o.rank_by = by;
        o.draw_seed = 5;
        const auto list = engine.recommend(0, o);
        REQUIRE(list.size() == 40);
        size_t ties_at_an_end = 0;
        for (size_t j = 0; j < list.size(); ++j) {
            const Recommendation& r = list[j];
            CHECK(r.rank_value == std::clamp(r.score, double(p.scale.min), double(p.scale.max)));
            if (by == RankBy::mean) CHECK(r.rank_value == r.prediction.mean);
            if (by == RankBy::lower) CHECK(r.rank_value == r.prediction.lower);
            if (by == RankBy::upper) CHECK(r.rank_value == r.prediction.upper);
            if (j == 0) continue;
            const Recommendation& q = list[j - 1];
            CHECK(q.rank_value >= r.rank_value);
            if (q.rank_value == r.rank_value) {
                CHECK(q.score >= r.score);
                ties_at_an_end += r.rank_value == p.scale.max || r.rank_value == p.scale.min;
            }
        }
        // Upper bounds and draws on this scale pass its maximum for several
        // items, so the tie rule is exercised where the issue arose.
        if (by == RankBy::upper || by == RankBy::draw) CHECK(ties_at_an_end > 0);
    }
}
