// Tests for the Gibbs sampler (model/gibbs_sweep, model/sampler): the sweep
// leaves the joint distribution invariant (Geweke's joint-distribution
// test), results do not depend on the thread count, synthetic data is
// recovered with calibrated intervals, numeric failure is reported, and
// every Posterior field is filled.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <functional>
#include <nlohmann/json.hpp>
#include <string>
#include <vector>

#include "model/math/distributions.hpp"
#include "model/error.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/normal_wishart.hpp"
#include "model/fit/sampler.hpp"
#include "tests/support/reference_mixture.hpp"
#include "tests/support/simulate.hpp"
#include "model/fit/sparse.hpp"

using namespace credence;
using credence::testing::reference_mixture_quantile;

namespace {

// ---- Geweke (2004), "Getting it right: joint distribution tests of posterior
// simulators", JASA 99(467): the marginal-conditional simulator draws
// (theta, r) from prior then likelihood; the successive-conditional simulator
// alternates one Gibbs sweep theta | r with a fresh r | theta. If every
// conditional is right, both sample the same joint distribution, so the
// means of any test function g(theta, r) agree.

constexpr uint32_t geweke_users = 5, geweke_items = 3, geweke_rank = 2;

// Pattern: users 0..3 rate every item except (3, 2); user 4 rates nothing,
// so the zero-rating path (draw from the prior) is exercised too.
RatingSet geweke_pattern() {
    RatingSet rs;
    for (uint32_t u = 0; u < geweke_users; ++u) rs.users.intern("customer-" + std::to_string(u));
    for (uint32_t i = 0; i < geweke_items; ++i) rs.items.intern("teapot-" + std::to_string(i));
    for (uint32_t u = 0; u < 4; ++u)
        for (uint32_t i = 0; i < geweke_items; ++i)
            if (!(u == 3 && i == 2)) rs.ratings.push_back({u, i, 0.0f});
    return rs;
}

FitOptions geweke_options() {
    FitOptions o;
    o.rank = geweke_rank;
    o.biases = true;
    o.sample_noise = true;
    // nu0 = K + 4 keeps fourth moments of the factors finite, so the CLT
    // behind the test statistic holds for the squared test functions.
    o.prior.nu0_minus_rank = 4.0;
    o.prior.beta0 = 2.0;
    o.prior.w0_scale = 1.0;
    o.prior.noise_shape = 3.0;
    o.prior.noise_rate = 2.0;
    o.prior.bias_shape = 3.0;
    o.prior.bias_rate = 2.0;
    return o;
}

double state_mean(const GibbsState& st, uint32_t u, uint32_t i) {
    double m = st.user_bias[u] + st.item_bias[i];
    for (uint32_t k = 0; k < st.rank; ++k) m += double(st.user_factors[u * st.rank + k]) * st.item_factors[i * st.rank + k];
    return m;
}

void draw_ratings(Rng& rng, const GibbsState& st, RatingSet& rs) {
    for (auto& r : rs.ratings)
        r.value = float(state_mean(st, r.user, r.item) + rng.normal() / std::sqrt(st.noise_precision));
}

// Prior draw of the whole state (global mean 0).
GibbsState forward_state(Rng& rng, const FitOptions& o) {
    GibbsState st;
    st.rank = o.rank;
    st.biases = true;
    NormalWishart nw;
    nw.mu = Eigen::VectorXd::Zero(o.rank);
    nw.beta = o.prior.beta0;
    nw.w = o.prior.w0_scale * Eigen::MatrixXd::Identity(o.rank, o.rank);
    nw.nu = o.rank + o.prior.nu0_minus_rank;
    auto side = [&](uint32_t rows, Eigen::VectorXd& mu, Eigen::MatrixXd& lambda, std::vector<float>& f,
                    std::vector<float>& b, double& bias_precision) {
        MeanPrecision mp = draw_normal_wishart(rng, nw);
        mu = mp.mu;
        lambda = mp.lambda;
        bias_precision = draw_gamma(rng, o.prior.bias_shape, o.prior.bias_rate);
        f.resize(size_t(rows) * o.rank);
        b.resize(rows);
        for (uint32_t r = 0; r < rows; ++r) {
            const Eigen::VectorXd x = draw_normal_from_precision(rng, mu, lambda);
            for (uint32_t k = 0; k < o.rank; ++k) f[r * o.rank + k] = float(x[k]);
            b[r] = float(rng.normal() / std::sqrt(bias_precision));
        }
    };
    side(geweke_users, st.user_mu, st.user_lambda, st.user_factors, st.user_bias, st.user_bias_precision);
    side(geweke_items, st.item_mu, st.item_lambda, st.item_factors, st.item_bias, st.item_bias_precision);
    st.noise_precision = draw_gamma(rng, o.prior.noise_shape, o.prior.noise_rate);
    return st;
}

// Test functions g(theta, r): first and second moments of parameters at
// every level of the hierarchy, a prediction, and a scaled residual.
std::vector<double> test_functions(const GibbsState& st, const RatingSet& rs) {
    const double m00 = state_mean(st, 0, 0);
    const double u00 = st.user_factors[0], u01 = st.user_factors[1];
    return {
        st.noise_precision,
        u00,
        u00 * u00,
        u00 * u01,
        st.user_factors[4 * geweke_rank + 1],      // the user with no ratings
        st.item_factors[2 * geweke_rank],
        st.user_bias[1],
        st.item_bias[2] * st.item_bias[2],
        m00,
        m00 * m00,
        st.user_lambda(0, 0),
        st.item_lambda(0, 1),
        st.user_mu[1],
        st.user_bias_precision,
        st.noise_precision * std::pow(rs.ratings[0].value - m00, 2),
    };
}

const char* const test_function_names[] = {
    "tau", "U00", "U00^2", "U00*U01", "U41 (no ratings)", "V20", "b1", "c2^2", "m00", "m00^2",
    "Lambda_U(0,0)", "Lambda_V(0,1)", "mu_U1", "lambda_b", "tau*(r00-m00)^2"};

struct Moments {
    std::vector<double> sum, sum2;
    void add(const std::vector<double>& g) {
        if (sum.empty()) sum.assign(g.size(), 0.0), sum2.assign(g.size(), 0.0);
        for (size_t j = 0; j < g.size(); ++j) sum[j] += g[j], sum2[j] += g[j] * g[j];
    }
};


struct HeldOut {
    double rmse = 0.0;
    double coverage90 = 0.0;
};

HeldOut evaluate_held_out(const Posterior& post, const std::vector<Rating>& test) {
    std::vector<double> m(post.num_samples), tau(post.num_samples);
    for (uint32_t s = 0; s < post.num_samples; ++s) tau[s] = post.noise_precision[s];
    double se = 0.0;
    size_t inside = 0;
    for (const auto& r : test) {
        double mean = 0.0;
        for (uint32_t s = 0; s < post.num_samples; ++s) mean += m[s] = post.sample_prediction(s, r.user, r.item);
        mean /= post.num_samples;
        se += (r.value - mean) * (r.value - mean);
        const double q05 = reference_mixture_quantile(m, tau, 0.05), q95 = reference_mixture_quantile(m, tau, 0.95);
        inside += (r.value >= q05 && r.value <= q95);
    }
    return {std::sqrt(se / double(test.size())), double(inside) / double(test.size())};
}

}  // namespace

TEST_CASE("Geweke joint-distribution test: the sweep leaves the model's joint distribution invariant") {
    const FitOptions o = geweke_options();
    const int n = 200000;
    // Marginal-conditional simulator: n independent prior-then-data draws.
    Moments fwd;
    {
        Rng rng(20240611);
        RatingSet rs = geweke_pattern();
        for (int t = 0; t < n; ++t) {
            const GibbsState st = forward_state(rng, o);
            draw_ratings(rng, st, rs);
            fwd.add(test_functions(st, rs));
        }
    }
    // Successive-conditional simulator, started from a prior draw, with the
    // chain's sequence cut into batches for the batch-means standard error.
    const int batches = 50, per_batch = n / batches;
    std::vector<Moments> batch(batches);
    {
        Rng rng(777);
        RatingSet rs = geweke_pattern();
        GibbsState st = forward_state(rng, o);
        draw_ratings(rng, st, rs);
        for (int t = 0; t < n; ++t) {
            const CsrMatrix by_user = csr_by_user(rs), by_item = csr_by_item(rs);
            const GibbsData data{&by_user, &by_item, 0.0};
            gibbs_sweep(data, o, SweepKey{99, 0, uint32_t(t)}, st, 1);
            draw_ratings(rng, st, rs);
            batch[t / per_batch].add(test_functions(st, rs));
        }
    }
    // Statistic per function: z = (mean_fwd - mean_sc) / sqrt(se_fwd^2 + se_sc^2),
    // se_fwd from the iid sample variance, se_sc from the spread of the 50 batch
    // means. Tolerance |z| < 4: a correct sampler exceeds it with probability
    // about 3e-4 per function (t with 49 df), and the seeds are fixed.
    const size_t nf = fwd.sum.size();
    for (size_t j = 0; j < nf; ++j) {
        const double mf = fwd.sum[j] / n;
        const double se_f = std::sqrt((fwd.sum2[j] / n - mf * mf) / n);
        double ms = 0.0, ss = 0.0;
        for (const auto& b : batch) ms += b.sum[j] / per_batch;
        ms /= batches;
        for (const auto& b : batch) ss += std::pow(b.sum[j] / per_batch - ms, 2);
        const double se_s = std::sqrt(ss / (batches - 1) / batches);
        const double z = (mf - ms) / std::sqrt(se_f * se_f + se_s * se_s);
        INFO(test_function_names[j] << ": forward " << mf << " +- " << se_f << ", Gibbs " << ms << " +- " << se_s
                                    << ", z = " << z);
        CHECK(std::abs(z) < 4.0);
    }
}

TEST_CASE("same seed gives a bit-identical posterior with 1 and 2 threads") {
    SimulationOptions so;
    so.users = 300;
    so.items = 200;
    so.rank = 3;
    so.density = 0.1;
    so.bias_sd = 0.3;
    so.seed = 11;
    const SimulatedData d = simulate_ratings(so);
    FitOptions o;
    o.rank = 4;
    o.run_length = RunLength::fixed;
    o.burn_in = 4;
    o.samples = 3;
    o.thin = 2;
    o.chains = 2;
    o.seed = 1234;
    o.threads = 1;
    const FitResult one = fit_bpmf(d.ratings, o);
    o.threads = 2;
    const FitResult two = fit_bpmf(d.ratings, o);
    const Posterior &a = one.posterior, &b = two.posterior;
    auto same = [](const std::vector<float>& x, const std::vector<float>& y) {
        return x.size() == y.size() && std::memcmp(x.data(), y.data(), x.size() * sizeof(float)) == 0;
    };
    CHECK(same(a.user_factors, b.user_factors));
    CHECK(same(a.item_factors, b.item_factors));
    CHECK(same(a.user_bias, b.user_bias));
    CHECK(same(a.item_bias, b.item_bias));
    CHECK(same(a.noise_precision, b.noise_precision));
    CHECK(same(a.user_lambda, b.user_lambda));
    CHECK(same(a.item_mu, b.item_mu));
    CHECK(same(one.trace.train_rmse, two.trace.train_rmse));
    // And a different seed gives a different posterior.
    o.seed = 1235;
    CHECK_FALSE(same(fit_bpmf(d.ratings, o).posterior.user_factors, a.user_factors));
}

TEST_CASE("a converged run stops at the first checkpoint that meets the targets, the same whatever the threads") {
    SimulationOptions so;
    so.users = 300;
    so.items = 200;
    so.rank = 2;
    so.density = 0.1;
    so.bias_sd = 0.3;
    so.seed = 5;
    const SimulatedData d = simulate_ratings(so);
    // Rank 2 on rank-2 data mixes within a few hundred sweeps; 3 chains on 2
    // threads make one worker run two chains, on 1 thread all run in turn.
    FitOptions o;
    o.rank = 2;
    o.samples = 20;
    o.chains = 3;
    o.seed = 77;
    o.threads = 1;
    const FitResult serial = fit_bpmf(d.ratings, o);
    o.threads = 2;
    const FitResult parallel = fit_bpmf(d.ratings, o);
    REQUIRE(serial.stop_reason == StopReason::converged);
    CHECK(serial.convergence.verdict == "converged");
    CHECK(serial.convergence.max_rhat <= 1.01);
    CHECK(std::min(serial.convergence.min_ess_bulk_per_chain, serial.convergence.min_ess_tail_per_chain) >= 100.0);
    CHECK(parallel.sweeps_per_chain == serial.sweeps_per_chain);
    CHECK(parallel.posterior.user_factors == serial.posterior.user_factors);
    CHECK(parallel.posterior.noise_precision == serial.posterior.noise_precision);
    CHECK(parallel.trace.noise_precision == serial.trace.noise_precision);

    // Checkpoints at 40, 50, 63, ... (a quarter further each time, rounded
    // up): the run ends on one, and its window is
    // the last three quarters. Each chain keeps exactly `samples` draws, all from the
    // window, in sweep order.
    const uint32_t n = serial.sweeps_per_chain;
    std::vector<uint32_t> checkpoints{40};
    while (checkpoints.back() < n) checkpoints.push_back((checkpoints.back() * 5 + 3) / 4);
    CHECK(checkpoints.back() == n);
    CHECK(serial.convergence.first_sweep == n / 4);
    CHECK(serial.convergence.draws_per_chain == n - n / 4);
    const Posterior& p = serial.posterior;
    REQUIRE(p.num_samples == 3 * 20);
    for (uint32_t c = 0; c < 3; ++c) {
        int64_t last = -1;
        for (uint32_t k = 0; k < 20; ++k) {
            const float tau = p.noise_precision[c * 20 + k];
            // The sweep it came from: the trace holds every sweep of chain c.
            int64_t found = -1;
            for (uint32_t j = n / 4; j < n; ++j)
                if (serial.trace.noise_precision[size_t(c) * n + j] == tau) found = j;
            INFO("chain " << c << " draw " << k);
            CHECK(found > last);
            last = found;
        }
    }
}

TEST_CASE("a spent sweep budget ends the run with advice that names --max-sweeps") {
    SimulationOptions so;
    so.users = 300;
    so.items = 200;
    so.rank = 2;
    so.density = 0.1;
    so.seed = 5;
    const SimulatedData d = simulate_ratings(so);
    FitOptions o;
    o.rank = 2;
    o.samples = 20;
    o.max_sweeps = 41;
    const FitResult r = fit_bpmf(d.ratings, o);
    CHECK(r.stop_reason == StopReason::max_sweeps);
    CHECK(r.sweeps_per_chain == 41);
    REQUIRE(r.convergence.verdict == "not_converged");
    REQUIRE(r.convergence.advice.size() >= 1);
    CHECK(r.convergence.advice.front().find("--max-sweeps") != std::string::npos);
    // Too small a budget for the first checkpoint (2 x samples) is refused.
    o.max_sweeps = 39;
    CHECK_THROWS_AS(fit_bpmf(d.ratings, o), OptionError);
}

TEST_CASE("synthetic recovery: held-out RMSE near the noise floor and calibrated 90% intervals") {
    // Data drawn from the model: 400 customers x 300 products, rank 5, noise sd 0.5.
    // Density 0.5, not 0.3: even an exact posterior adds parameter uncertainty of
    // about sigma^2 * D (1/n_user + 1/n_item) to the squared error (D = 6 with the
    // bias; back-of-envelope, common practice). At 30% density (~80 train ratings
    // per customer, ~110 per product) that is ~13% of the noise variance, so the
    // RMSE floor is ~0.53, above the 5% band (measured 0.537); at 50% it is ~8%.
    SimulationOptions so;
    so.users = 400;
    so.items = 300;
    so.rank = 5;
    so.density = 0.5;
    so.noise_sd = 0.5;
    so.bias_sd = 0.3;
    so.seed = 3;
    const SimulatedData d = simulate_ratings(so);
    const HoldoutSplit split = split_holdout(d.ratings, 0.1, 17);
    FitOptions o;
    o.rank = 5;
    o.run_length = RunLength::fixed;
    o.burn_in = 40;
    o.samples = 40;
    o.thin = 1;
    o.chains = 2;
    o.seed = 5;
    const FitResult fit = fit_bpmf(split.train, o);
    const HeldOut h = evaluate_held_out(fit.posterior, split.test);
    INFO("held-out RMSE " << h.rmse << ", 90% coverage " << h.coverage90 << " over " << split.test.size()
                          << " ratings, fit " << fit.seconds << " s");
    // The best possible RMSE is the noise sd 0.5; allow 5% for estimation error.
    CHECK(h.rmse < 1.05 * so.noise_sd);
    // Coverage of n = ~6000 held-out ratings has Monte Carlo sd sqrt(0.9*0.1/n) ~ 0.004;
    // the band 0.86..0.94 is about 10 sd wide on each side.
    CHECK(h.coverage90 > 0.86);
    CHECK(h.coverage90 < 0.94);
    // The noise precision is recovered: 1/0.5^2 = 4 (posterior mean within 5%).
    double tau = 0.0;
    for (float t : fit.posterior.noise_precision) tau += t;
    tau /= fit.posterior.num_samples;
    CHECK(std::abs(tau - 4.0) < 0.2);
}

TEST_CASE("fit fills every posterior field, the trace and the metadata") {
    SimulationOptions so;
    so.users = 60;
    so.items = 40;
    so.rank = 2;
    so.density = 0.3;
    so.seed = 8;
    const SimulatedData d = simulate_ratings(so);
    const HoldoutSplit split = split_holdout(d.ratings, 0.2, 1);
    FitOptions o;
    o.rank = 3;
    o.run_length = RunLength::fixed;
    o.burn_in = 3;
    o.samples = 4;
    o.thin = 2;
    o.chains = 2;
    const FitResult fit = fit_bpmf(split.train, o, &split.test);
    const Posterior& p = fit.posterior;
    REQUIRE_NOTHROW(p.validate());
    CHECK(p.num_samples == 8);
    CHECK(p.num_chains == 2);
    CHECK(p.sample_chain == std::vector<uint32_t>{0, 0, 0, 0, 1, 1, 1, 1});
    CHECK(p.user_ids == split.train.users.names());
    CHECK(p.item_ids == split.train.items.names());
    CHECK(p.global_mean == Approx(split.train.mean()));
    CHECK(p.scale.min == split.train.scale.min);
    CHECK(p.rated_items.size() == split.train.size());
    for (const auto& r : split.train.ratings) {
        const auto rated = p.rated_by(r.user);
        CHECK(std::binary_search(rated.begin(), rated.end(), r.item));
    }
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        CHECK(p.user_bias_precision[s] > 0.0f);
        CHECK(p.user_lambda[s * 9] > 0.0f);
    }
    // Kept samples differ from one another (they are draws, not copies).
    CHECK(p.user_factors[0] != p.user_factors[p.num_users * p.rank]);

    const uint32_t sweeps = 3 + 4 * 2;
    REQUIRE(fit.trace.sweep.size() == 2 * sweeps);
    CHECK(fit.sweeps_per_chain == sweeps);
    CHECK(fit.stop_reason == StopReason::fixed_length);
    for (size_t j = 0; j < fit.trace.sweep.size(); ++j) {
        CHECK(fit.trace.chain[j] == j / sweeps);
        CHECK(fit.trace.sweep[j] == j % sweeps);
    }
    // Burn-in 3, thin 2: 0-based sweeps 4, 6, 8 and 10 (the last) of each
    // chain are kept; the kept noise precisions are those of the trace there.
    for (uint32_t c = 0; c < 2; ++c)
        for (uint32_t k = 0; k < 4; ++k)
            CHECK(p.noise_precision[c * 4 + k] == fit.trace.noise_precision[c * sweeps + 4 + 2 * k]);
    // The convergence figures come from every sweep after burn-in.
    CHECK(fit.convergence.assessed == "every_sweep");
    CHECK(fit.convergence.first_sweep == 3);
    CHECK(fit.convergence.draws_per_chain == 8);
    CHECK(nlohmann::json::parse(p.diagnostics_json)["assessed"] == "every_sweep");

    const auto meta = nlohmann::json::parse(p.fit_metadata_json);
    CHECK(meta["options"]["rank"] == 3);
    CHECK(meta["seed"] == o.seed);
    CHECK(meta["trace"]["train_rmse"].size() == 2 * sweeps);
    CHECK(meta["trace"]["noise_precision"].size() == 2 * sweeps);
    CHECK(meta["timings"]["total_s"].get<double>() > 0.0);

    // Without biases the bias arrays stay empty.
    o.biases = false;
    const Posterior nb = fit_bpmf(split.train, o).posterior;
    CHECK(nb.user_bias.empty());
    CHECK_FALSE(nb.has_biases);
    CHECK_NOTHROW(nb.validate());
}

TEST_CASE("impossible options are rejected before any work, naming the flag") {
    SimulationOptions so;
    so.users = 10;
    so.items = 10;
    const SimulatedData d = simulate_ratings(so);
    CHECK_THROWS_AS(fit_bpmf(d.ratings, FitOptions{.rank = 0}), OptionError);
    CHECK_THROWS_WITH(fit_bpmf(d.ratings, FitOptions{.rank = 0}), Catch::Contains("--rank"));
    CHECK_THROWS_AS(fit_bpmf(d.ratings, FitOptions{.samples = 0}), OptionError);
    CHECK_THROWS_WITH(fit_bpmf(d.ratings, FitOptions{.samples = 0}), Catch::Contains("--samples"));
    CHECK_THROWS_AS(fit_bpmf(d.ratings, FitOptions{.run_length = RunLength::fixed, .samples = 100'000, .burn_in = 4'000'000'000u, .thin = 10'000}),
                    OptionError);
    CHECK_THROWS_AS(fit_bpmf(d.ratings, FitOptions{.prior = {.nu0_minus_rank = -1.0}}), OptionError);
}

TEST_CASE("a training set that breaks fit_bpmf's promises is a bug, not a user's error") {
    SimulationOptions so;
    so.users = 10;
    so.items = 10;
    const SimulatedData d = simulate_ratings(so);
    RatingSet dup = d.ratings;
    dup.ratings.push_back(dup.ratings.front());
    std::sort(dup.ratings.begin(), dup.ratings.end(),
              [](auto& a, auto& b) { return std::tie(a.user, a.item) < std::tie(b.user, b.item); });
    CHECK_THROWS_AS(fit_bpmf(dup, FitOptions{}), std::invalid_argument);
    CHECK_THROWS_AS(fit_bpmf(RatingSet{}, FitOptions{}), std::invalid_argument);
}

TEST_CASE("a conditional precision that is not positive definite raises NumericError, never NaN") {
    // Directly: an indefinite prior precision and no ratings.
    Eigen::MatrixXd prior(2, 2);
    prior << 1.0, 0.0, 0.0, -0.5;
    const Eigen::VectorXd pm = Eigen::VectorXd::Zero(2);
    Eigen::MatrixXd x(2, 0);
    RowWorkspace p;
    Eigen::VectorXd y(0), out;
    Rng rng(1);
    try {
        draw_row(prior, pm, x, y, 1.0, rng, RowContext{1, 7, "item", 42}, p, out);
        FAIL("expected NumericError");
    } catch (const NumericError& e) {
        const std::string msg = e.what();
        CHECK(msg.find("chain 1") != std::string::npos);
        CHECK(msg.find("sweep 7") != std::string::npos);
        CHECK(msg.find("item row 42") != std::string::npos);
        CHECK(msg.find("-0.5") != std::string::npos);
    }
    // With ratings that cannot rescue it: tau X X^T is rank one here, and a
    // strongly negative direction stays negative.
    prior << 1.0, 0.0, 0.0, -100.0;
    Eigen::MatrixXd x1(2, 1);
    x1 << 1.0, 0.0;
    Eigen::VectorXd y1(1);
    y1 << 1.0;
    CHECK_THROWS_AS(draw_row(prior, pm, x1, y1, 1.0, rng, RowContext{}, p, out), NumericError);

    // Through fit_bpmf: absurd but valid options overflow the conditional
    // precision to infinity; the fit must stop with NumericError.
    SimulationOptions so;
    so.users = 30;
    so.items = 20;
    so.density = 0.5;
    const SimulatedData d = simulate_ratings(so);
    FitOptions o;
    o.rank = 2;
    o.run_length = RunLength::fixed;
    o.burn_in = 2;
    o.samples = 2;
    o.chains = 1;
    o.sample_noise = false;
    o.fixed_noise_precision = 1e308;
    o.init_scale = 1e10;
    CHECK_THROWS_AS(fit_bpmf(d.ratings, o), NumericError);
}
