// Tests for the Gibbs sampler (model/gibbs_sweep, model/group_moves,
// model/sampler): the sweep and each group move leave the joint distribution
// invariant (Geweke's joint-distribution test, which also shows that it
// notices each move broken in turn), simulation-based calibration of fits
// (and that it notices a broken move), coverage of credible intervals on
// known truth, results do not depend on the thread count, synthetic data is
// recovered with calibrated intervals, numeric failure is reported, and
// every Posterior field is filled. Cases tagged [slow] (hundreds of
// replications, or Geweke's 200,000 forward draws and as many sweeps) run as
// the ctest entry test_sampler_slow, which the sanitized suite leaves out
// (DEVELOPERS.md).
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <cstring>
#include <iterator>
#include <functional>
#include <nlohmann/json.hpp>
#include <sstream>
#include <string>
#include <utility>
#include <vector>

#include "model/math/convergence_diagnostics.hpp"
#include "model/math/cpu_level.hpp"
#include "model/math/distributions.hpp"
#include "model/error.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/group_moves.hpp"
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

// Prior draw of the whole state (global mean 0) for `users` x `items`.
GibbsState forward_state(Rng& rng, const FitOptions& o, uint32_t users = geweke_users, uint32_t items = geweke_items) {
    GibbsState st;
    st.rank = o.rank;
    st.biases = true;
    NormalWishart nw;
    nw.mu = Eigen::VectorXd::Zero(o.rank);
    nw.beta = o.prior.beta0;
    nw.w = o.prior.w0_scale * Eigen::MatrixXd::Identity(o.rank, o.rank);
    nw.nu = o.rank + o.prior.nu0_minus_rank;
    auto side = [&](uint32_t rows, Eigen::VectorXd& mu, Eigen::MatrixXd& lambda, FactorRows& f,
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
    side(users, st.user_mu, st.user_lambda, st.user_factors, st.user_bias, st.user_bias_precision);
    side(items, st.item_mu, st.item_lambda, st.item_factors, st.item_bias, st.item_bias_precision);
    st.noise_precision = draw_gamma(rng, o.prior.noise_shape, o.prior.noise_rate);
    return st;
}

double dot_rows(const FactorRows& a, uint32_t i, const FactorRows& b, uint32_t j, uint32_t K) {
    double d = 0.0;
    for (uint32_t k = 0; k < K; ++k) d += double(a[i * K + k]) * b[j * K + k];
    return d;
}

double sum_of(const std::vector<float>& x) {
    double s = 0.0;
    for (float v : x) s += v;
    return s;
}


// Test functions g(theta, r): first and second moments of parameters at
// every level of the hierarchy, a prediction, and a scaled residual; then
// functions that each group move changes (model/fit/group_moves.hpp): the
// user and item shifts move mu_U, mu_V, the factors and the other side's
// biases (sums, and products of a bias with a factor); the bias shift moves
// the bias sums; the scalings and shears of the factor space move Lambda's
// entries, single factor coordinates and their products.
std::vector<double> test_functions(const GibbsState& st, const RatingSet& rs) {
    const uint32_t K = geweke_rank;
    const double m00 = state_mean(st, 0, 0);
    const double u00 = st.user_factors[0], u01 = st.user_factors[1];
    const double v00 = st.item_factors[0], v01 = st.item_factors[1];
    const double sum_b = sum_of(st.user_bias), sum_c = sum_of(st.item_bias);
    return {
        st.noise_precision,
        u00,
        u00 * u00,
        u00 * u01,
        st.user_factors[4 * K + 1],  // the user with no ratings
        st.item_factors[2 * K],
        st.user_bias[1],
        st.item_bias[2] * st.item_bias[2],
        m00,
        m00 * m00,
        st.user_lambda(0, 0),
        st.item_lambda(0, 1),
        st.user_mu[1],
        st.user_bias_precision,
        st.noise_precision * std::pow(rs.ratings[0].value - m00, 2),
        // ---- sensitive to the group moves
        st.user_mu[0],
        st.item_mu[0],
        st.item_mu[1],
        st.user_mu[0] * st.user_mu[0],
        st.item_mu[1] * st.item_mu[1],
        st.user_mu.dot(st.item_mu),
        sum_b,
        sum_c,
        sum_c * sum_c,
        sum_b * sum_c,
        st.item_bias[0] * v00,
        st.user_bias[0] * u00,
        st.user_lambda(0, 1),
        st.user_lambda(1, 1),
        st.item_lambda(0, 0),
        st.item_lambda(1, 1),
        std::log(st.user_lambda(0, 0)),
        v00 * v00,
        v00 * v01,
        dot_rows(st.user_factors, 0, st.item_factors, 1, K),
        dot_rows(st.user_factors, 2, st.item_factors, 2, K),
        factor_cov_product(st.user_lambda, st.item_lambda),
    };
}

const char* const test_function_names[] = {
    "tau", "U00", "U00^2", "U00*U01", "U41 (no ratings)", "V20", "b1", "c2^2", "m00", "m00^2",
    "Lambda_U(0,0)", "Lambda_V(0,1)", "mu_U1", "lambda_b", "tau*(r00-m00)^2",
    "mu_U0", "mu_V0", "mu_V1", "mu_U0^2", "mu_V1^2", "mu_U.mu_V", "sum b", "sum c", "(sum c)^2", "sum b * sum c",
    "c0*V00", "b0*U00", "Lambda_U(0,1)", "Lambda_U(1,1)", "Lambda_V(0,0)", "Lambda_V(1,1)", "log Lambda_U(0,0)",
    "V00^2", "V00*V01", "U0.V1", "U2.V2", "tr(Lambda_U^-1 Lambda_V^-1)"};

struct Moments {
    std::vector<double> sum, sum2;
    void add(const std::vector<double>& g) {
        if (sum.empty()) sum.assign(g.size(), 0.0), sum2.assign(g.size(), 0.0);
        for (size_t j = 0; j < g.size(); ++j) sum[j] += g[j], sum2[j] += g[j] * g[j];
    }
};

// Marginal-conditional simulator: n independent prior-then-data draws.
// Computed once per process and shared by every Geweke test case.
constexpr int geweke_forward_draws = 200000;
const Moments& forward_moments() {
    static const Moments fwd = [] {
        const FitOptions o = geweke_options();
        Moments m;
        Rng rng(20240611);
        RatingSet rs = geweke_pattern();
        for (int t = 0; t < geweke_forward_draws; ++t) {
            const GibbsState st = forward_state(rng, o);
            draw_ratings(rng, st, rs);
            m.add(test_functions(st, rs));
        }
        return m;
    }();
    return fwd;
}

// One transition of the posterior simulator on data and state.
using Transition = std::function<void(const GibbsData&, const SweepKey&, GibbsState&)>;

// Successive-conditional simulator: n transitions, each followed by fresh
// ratings given the state, started from a prior draw; the sequence is cut
// into 50 batches for the batch-means standard error. Returns one z per
// test function: z = (mean_fwd - mean_sc) / sqrt(se_fwd^2 + se_sc^2), se_fwd
// from the iid sample variance, se_sc from the spread of the batch means.
std::vector<double> geweke_z(const Transition& transition, int n, uint64_t seed) {
    const Moments& fwd = forward_moments();
    const int batches = 50, per_batch = n / batches;
    std::vector<Moments> batch(batches);
    Rng rng(777);
    RatingSet rs = geweke_pattern();
    GibbsState st = forward_state(rng, geweke_options());
    draw_ratings(rng, st, rs);
    for (int t = 0; t < batches * per_batch; ++t) {
        const CsrMatrix by_user = csr_by_user(rs), by_item = csr_by_item(rs);
        const GibbsData data{&by_user, &by_item, 0.0};
        transition(data, SweepKey{seed, 0, uint32_t(t)}, st);
        draw_ratings(rng, st, rs);
        batch[t / per_batch].add(test_functions(st, rs));
    }
    const int nf = geweke_forward_draws;
    std::vector<double> z(fwd.sum.size());
    for (size_t j = 0; j < z.size(); ++j) {
        const double mf = fwd.sum[j] / nf;
        const double se_f = std::sqrt((fwd.sum2[j] / nf - mf * mf) / nf);
        double ms = 0.0, ss = 0.0;
        for (const auto& b : batch) ms += b.sum[j] / per_batch;
        ms /= batches;
        for (const auto& b : batch) ss += std::pow(b.sum[j] / per_batch - ms, 2);
        const double se_s = std::sqrt(ss / (batches - 1) / batches);
        z[j] = (mf - ms) / std::sqrt(se_f * se_f + se_s * se_s);
    }
    return z;
}

std::string describe(const std::vector<double>& z) {
    std::ostringstream out;
    for (size_t j = 0; j < z.size(); ++j) out << test_function_names[j] << " z = " << z[j] << "\n";
    return out.str();
}

// The largest |z| and the function it belongs to.
std::pair<double, std::string> worst(const std::vector<double>& z) {
    size_t at = 0;
    for (size_t j = 1; j < z.size(); ++j)
        if (std::abs(z[j]) > std::abs(z[at])) at = j;
    return {std::abs(z[at]), test_function_names[at]};
}

// The group moves of model/fit/group_moves.hpp composed from their seam,
// with the draws apply_group_moves() makes, and at most one move broken.
enum class Broken {
    none,
    scale_w0,          // the scalings' GIG drawn with W0 = 2 w I instead of w I
    shear_zero_mean,   // the shears drawn about 0, their conditional mean left out
    user_shift_beta0,  // the user shift's conditional with beta0 / 4
    item_shift_users,  // the item shift's conditional from the user side's mu and Lambda
    bias_shift_swap,   // the bias shift's conditional with lambda_b and lambda_c swapped
};

// The state with the item side's mu and Lambda replaced by the user side's:
// what a move that reads the wrong side sees.
GibbsState user_hyper_as_items(const GibbsState& st) {
    GibbsState out = st;
    out.item_mu = st.user_mu;
    out.item_lambda = st.user_lambda;
    return out;
}

// The state with its two bias precisions swapped: what a move that reads the
// wrong one sees.
GibbsState swapped_bias_precisions(const GibbsState& st) {
    GibbsState out = st;
    std::swap(out.user_bias_precision, out.item_bias_precision);
    return out;
}

void composed_moves(const FitOptions& o, const SweepKey& key, GibbsState& st, Broken broken, int threads) {
    FitOptions wrong = o;
    wrong.prior.w0_scale = 2.0 * o.prior.w0_scale;
    wrong.prior.beta0 = o.prior.beta0 / 4.0;
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, 3);
        FactorMap map = identity_factor_map(st.rank);
        for (uint32_t k = 0; k < st.rank; ++k) {
            const ScaleConditional c = scale_conditional(broken == Broken::scale_w0 ? wrong : o, st, k);
            scale_factor_axis(st, map, k, std::exp(0.5 * (c.log_eta + draw_log_symmetric_gig(rng, c.omega))));
        }
        for (uint32_t i = 0; i < st.rank; ++i)
            for (uint32_t j = 0; j < st.rank; ++j) {
                if (i == j) continue;
                ShearConditional c = shear_conditional(o, st, i, j);
                if (broken == Broken::shear_zero_mean) c.mean = 0.0;
                shear_factor_axes(st, map, i, j, c.mean + rng.normal() * c.sd);
            }
        symmetrize_precisions(st);
        apply_factor_map(st, map, threads);
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, 0);
        const ShiftConditional c = user_shift_conditional(broken == Broken::user_shift_beta0 ? wrong : o, st, threads);
        shift_users(st, draw_shift(c, rng, key, "user"), threads);
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, 1);
        const ShiftConditional c =
            item_shift_conditional(o, broken == Broken::item_shift_users ? user_hyper_as_items(st) : st, threads);
        shift_items(st, draw_shift(c, rng, key, "item"), threads);
    }
    {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves, 2);
        const ShiftConditional c =
            bias_shift_conditional(broken == Broken::bias_shift_swap ? swapped_bias_precisions(st) : st);
        const double precision = c.precision(0, 0);
        shift_biases(st, c.precision_mean(0) / precision + rng.normal() / std::sqrt(precision));
    }
}

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

// ---- Simulation-based calibration (Talts, Betancourt, Simpson, Vehtari &
// Gelman 2018, "Validating Bayesian inference algorithms with
// simulation-based calibration", arXiv:1804.06788): draw (theta, r) from the
// joint, fit r, and count how many of the L posterior draws of a scalar
// f(theta) fall below f(theta_true). For an exact sampler with independent
// draws that rank is uniform on 0..L for every f.
//
// fit_bpmf subtracts the training mean g from the ratings (sampler.hpp), so
// its posterior is the exact posterior of the model with g = 0 only for data
// whose mean is 0. The replications are therefore drawn from the joint
// conditioned on mean(r) = 0, an event that depends on r alone, so the
// posterior given such r is unchanged and SBC's guarantee holds: with n
// ratings of noise-free means m(theta),
//   p(theta | mean r = 0)  ~  p(theta) sqrt(tau) exp(-n tau mbar(theta)^2 / 2),
//   r | theta, mean r = 0  =  (m + e) - mean(m + e),  e ~ Normal(0, 1/tau) iid
// (for iid Gaussian e, e - mean(e) is independent of mean(e)). The first is
// sampled exactly: tau from Gamma(a + 1/2, b) (the Gamma(a, b) prior times
// sqrt(tau)), the rest from the prior, accepted with probability
// exp(-n tau mbar^2 / 2) <= 1. (Ratings are stored as float, so the fit's g
// is about 1e-8, not 0: far below any posterior sd here.)

constexpr uint32_t sbc_users = 10, sbc_items = 8, sbc_rank = 2;

// Each customer rates 5 of the 8 products (50 ratings; every product rated 6 or 7 times).
RatingSet sbc_pattern() {
    RatingSet rs;
    for (uint32_t u = 0; u < sbc_users; ++u) rs.users.intern("customer-" + std::to_string(u));
    for (uint32_t i = 0; i < sbc_items; ++i) rs.items.intern("lantern-" + std::to_string(i));
    for (uint32_t u = 0; u < sbc_users; ++u)
        for (uint32_t i = 0; i < sbc_items; ++i)
            if ((3 * u + i) % sbc_items < 5) rs.ratings.push_back({u, i, 0.0f});
    return rs;
}

// A prior under which the factors carry about as much of a rating as the
// noise: E Lambda = nu0 w0 I = 2 I, so u.v has sd about 0.7, and tau ~
// Gamma(3, 2) (noise sd about 0.8).
FitOptions sbc_options() {
    FitOptions o = geweke_options();
    o.rank = sbc_rank;
    o.prior.nu0_minus_rank = 2.0;
    o.prior.w0_scale = 0.5;
    o.init_scale = 0.5;  // fixed, so a chain driven sweep by sweep starts where fit_bpmf's does
    o.run_length = RunLength::fixed;
    return o;
}

struct SbcReplication {
    GibbsState truth;
    RatingSet ratings;
};

SbcReplication draw_sbc_replication(Rng& rng, const FitOptions& o) {
    SbcReplication rep;
    rep.ratings = sbc_pattern();
    const double n = double(rep.ratings.ratings.size());
    for (;;) {
        rep.truth = forward_state(rng, o, sbc_users, sbc_items);
        rep.truth.noise_precision = draw_gamma(rng, o.prior.noise_shape + 0.5, o.prior.noise_rate);
        double mbar = 0.0;
        for (const auto& r : rep.ratings.ratings) mbar += state_mean(rep.truth, r.user, r.item);
        mbar /= n;
        if (rng.uniform() < std::exp(-0.5 * n * rep.truth.noise_precision * mbar * mbar)) break;
    }
    std::vector<double> x;
    double xbar = 0.0;
    for (const auto& r : rep.ratings.ratings) {
        x.push_back(state_mean(rep.truth, r.user, r.item) + rng.normal() / std::sqrt(rep.truth.noise_precision));
        xbar += x.back() / n;
    }
    for (size_t j = 0; j < x.size(); ++j) rep.ratings.ratings[j].value = float(x[j] - xbar);
    float lo = rep.ratings.ratings[0].value, hi = lo;
    for (const auto& r : rep.ratings.ratings) lo = std::min(lo, r.value), hi = std::max(hi, r.value);
    rep.ratings.scale = {lo, hi, false};
    return rep;
}

// The quantities ranked: the noise precision, the factor-mean interaction
// mu_U . mu_V, the factor covariance product, and the noise-free mean rating
// of three (customer, product) pairs: rated, not rated, and not rated by a
// customer whose other ratings share no product with customer 0's.
const char* const sbc_names[] = {"tau", "mu_U.mu_V", "tr(Lambda_U^-1 Lambda_V^-1)", "m(0,0) rated",
                                 "m(1,7) not rated", "m(5,2) not rated"};
constexpr size_t sbc_quantity_count = std::size(sbc_names);
constexpr std::pair<uint32_t, uint32_t> sbc_pairs[] = {{0, 0}, {1, 7}, {5, 2}};

std::vector<double> sbc_quantities(const GibbsState& st) {
    std::vector<double> q = {st.noise_precision, st.user_mu.dot(st.item_mu),
                             factor_cov_product(st.user_lambda, st.item_lambda)};
    for (const auto& [u, i] : sbc_pairs) q.push_back(state_mean(st, u, i));
    return q;
}

std::vector<double> sbc_quantities(const Posterior& p, uint32_t s) {
    const uint32_t K = p.rank;
    auto matrix = [&](const std::vector<float>& f) {
        Eigen::MatrixXd m(K, K);
        for (uint32_t a = 0; a < K; ++a)
            for (uint32_t b = 0; b < K; ++b) m(a, b) = f[(size_t(s) * K + a) * K + b];
        return m;
    };
    double mu_dot = 0.0;
    for (uint32_t k = 0; k < K; ++k) mu_dot += double(p.user_mu[s * K + k]) * p.item_mu[s * K + k];
    std::vector<double> q = {p.noise_precision[s], mu_dot, factor_cov_product(matrix(p.user_lambda), matrix(p.item_lambda))};
    for (const auto& [u, i] : sbc_pairs) {
        double m = p.user_bias_of(s, u) + p.item_bias_of(s, i);
        for (uint32_t k = 0; k < K; ++k) m += double(p.user_factor(s, u)[k]) * p.item_factor(s, i)[k];
        q.push_back(m);  // without g, as the truth (g is ~1e-8 here, see above)
    }
    return q;
}

// Survival function of the chi-square distribution, P(X > x), for df degrees
// of freedom, from the closed forms of the regularized upper incomplete gamma
// function Q(df/2, x/2) at integer and half-integer arguments (Abramowitz &
// Stegun, Handbook of Mathematical Functions, 26.4.4 and 26.4.5):
//   even df = 2m:   Q = exp(-y) sum_{k<m} y^k / k!
//   odd df = 2m+1:  Q = erfc(sqrt y) + exp(-y) sum_{k<m} y^(k+1/2) / Gamma(k + 3/2),  y = x/2.
double chi_square_survival(double x, int df) {
    const double y = 0.5 * x;
    double sum = 0.0;
    if (df % 2 == 0) {
        double term = 1.0;
        for (int k = 0; k < df / 2; ++k) sum += term, term *= y / (k + 1);
        return std::exp(-y) * sum;
    }
    double term = std::sqrt(y) / std::tgamma(1.5);
    for (int k = 0; k < df / 2; ++k) sum += term, term *= y / (k + 1.5);
    return std::erfc(std::sqrt(y)) + std::exp(-y) * sum;
}

// Ranks 0..L of many replications pooled into `bins` equal bins of (L + 1)
// / bins ranks; Pearson's chi-square against equal counts, bins - 1 df.
struct RankHistogram {
    std::vector<int> counts;
    double chi_square = 0.0, p_value = 0.0;
};

RankHistogram rank_histogram(const std::vector<int>& ranks, int draws, int bins) {
    RankHistogram h;
    h.counts.assign(bins, 0);
    for (int r : ranks) ++h.counts[size_t(r) * bins / size_t(draws + 1)];
    const double expected = double(ranks.size()) / bins;
    for (int c : h.counts) h.chi_square += (c - expected) * (c - expected) / expected;
    h.p_value = chi_square_survival(h.chi_square, bins - 1);
    return h;
}

std::string show(const RankHistogram& h) {
    std::ostringstream out;
    out << "counts";
    for (int c : h.counts) out << " " << c;
    out << "; chi-square " << h.chi_square << ", p = " << h.p_value;
    return out.str();
}

// The SBC run: `replications` draws from the conditioned joint; `fit` turns
// ratings into draws[l][quantity] (l < sbc_draws). Returns the ranks per
// quantity and the mean over replications of each quantity's bulk-ESS / L.
// L = 99 draws per replication: ranks 0..99 fall evenly into 10 bins of 10
// ranks (Talts et al. 2018 pool the L + 1 ranks into bins so that each bin's
// expected count is large enough for the chi-square approximation).
constexpr int sbc_draws = 99;
struct SbcResult {
    std::vector<std::vector<int>> ranks;  // [quantity][replication]
    std::vector<double> ess_ratio;        // [quantity]
};

SbcResult run_sbc(int replications, uint64_t seed,
                  const std::function<std::vector<std::vector<double>>(const RatingSet&, int)>& fit) {
    const FitOptions o = sbc_options();
    SbcResult out;
    out.ranks.assign(sbc_quantity_count, {});
    out.ess_ratio.assign(sbc_quantity_count, 0.0);
    Rng rng(seed);
    for (int rep = 0; rep < replications; ++rep) {
        const SbcReplication r = draw_sbc_replication(rng, o);
        const std::vector<double> truth = sbc_quantities(r.truth);
        const auto draws = fit(r.ratings, rep);
        for (size_t q = 0; q < sbc_quantity_count; ++q) {
            int rank = 0;
            ChainDraws chain(1);
            for (const auto& d : draws) {
                rank += d[q] < truth[q];
                chain[0].push_back(d[q]);
            }
            out.ranks[q].push_back(rank);
            out.ess_ratio[q] += convergence(chain).ess_bulk / double(draws.size()) / replications;
        }
    }
    return out;
}

// One chain of sbc_burn_in + L * sbc_thin sweeps, every sbc_thin-th kept.
// Thinning: the draws should be nearly independent, or the rank histogram
// is over-dispersed whatever the sampler's correctness (Talts et al. 2018,
// section 5). Measured on these replications (mean over 200 of the bulk-ESS
// of L = 99 kept draws, divided by L): thin 1 gives 0.19 for tau and
// 0.55-0.83 for the rest; thin 5 gives 0.58 for tau; thin 10 gives 0.83 for
// tau and 0.95-1.0 for the rest; thin 20 gives 0.93 for tau. tau (which
// trades against the overall factor scale) mixes slowest; thin 10 keeps it
// near independence at half the cost of thin 20. Burn-in 100 sweeps is
// about 20 integrated autocorrelation times of tau (~5 sweeps at thin 1).
constexpr uint32_t sbc_burn_in = 100, sbc_thin = 10;

// fit_bpmf as a user runs it.
std::vector<std::vector<double>> fit_for_sbc(const RatingSet& ratings, int rep) {
    FitOptions o = sbc_options();
    o.chains = 1;
    o.burn_in = sbc_burn_in;
    o.samples = sbc_draws;
    o.thin = sbc_thin;
    o.seed = 5000 + uint64_t(rep);
    o.threads = 1;
    const Posterior p = fit_bpmf(ratings, o).posterior;
    std::vector<std::vector<double>> draws;
    for (uint32_t s = 0; s < p.num_samples; ++s) draws.push_back(sbc_quantities(p, s));
    return draws;
}

// The same chain as fit_for_sbc, driven sweep by sweep: the sweep without
// moves, then the moves composed from their seam with one of them broken.
std::vector<std::vector<double>> fit_with_moves(const RatingSet& ratings, int rep, Broken broken) {
    const FitOptions o = sbc_options();
    FitOptions plain = o;
    plain.group_moves = false;
    const CsrMatrix by_user = csr_by_user(ratings), by_item = csr_by_item(ratings);
    const GibbsData data{&by_user, &by_item, ratings.mean()};
    const uint64_t seed = 5000 + uint64_t(rep);
    GibbsState st = initial_state(data, o, seed, 0);
    std::vector<std::vector<double>> draws;
    for (uint32_t t = 0; t < sbc_burn_in + sbc_draws * sbc_thin; ++t) {
        const SweepKey key{seed, 0, t};
        gibbs_sweep(data, plain, key, st, 1);
        composed_moves(o, key, st, broken, 1);
        if (t >= sbc_burn_in && (t - sbc_burn_in + 1) % sbc_thin == 0) draws.push_back(sbc_quantities(st));
    }
    return draws;
}

}  // namespace

TEST_CASE("Geweke joint-distribution test: the sweep, its overrelaxed row draws and its group moves leave the model's joint distribution invariant",
          "[slow]") {
    const FitOptions o = geweke_options();
    REQUIRE(o.group_moves);
    REQUIRE(o.overrelaxation != 0.0);
    const std::vector<double> z = geweke_z(
        [&](const GibbsData& data, const SweepKey& key, GibbsState& st) { gibbs_sweep(data, o, key, st, 1); },
        200000, 99);
    // Tolerance |z| < 4: a correct sampler exceeds it with probability about
    // 3e-4 per function (t with 49 df), about 1% over the 37 functions, and
    // the seeds are fixed.
    INFO(describe(z));
    for (double zj : z) CHECK(std::abs(zj) < 4.0);
}

TEST_CASE("the group moves composed from their seam are apply_group_moves, bit for bit") {
    const FitOptions o = geweke_options();
    Rng rng(5);
    for (uint32_t t = 0; t < 20; ++t) {
        const GibbsState start = forward_state(rng, o, 40, 30);
        GibbsState product = start, composed = start;
        const SweepKey key{31, 1, t};
        apply_group_moves(o, key, product, 1);
        composed_moves(o, key, composed, Broken::none, 1);
        CHECK(product.user_factors == composed.user_factors);
        CHECK(product.item_factors == composed.item_factors);
        CHECK(product.user_bias == composed.user_bias);
        CHECK(product.item_bias == composed.item_bias);
        CHECK(product.user_mu == composed.user_mu);
        CHECK(product.item_mu == composed.item_mu);
        CHECK(product.user_lambda == composed.user_lambda);
        CHECK(product.item_lambda == composed.item_lambda);
        // And the moves did move the state.
        CHECK(product.user_factors != start.user_factors);
        CHECK(product.item_bias != start.item_bias);
    }
}

// The row passes of the moves sum rows in fixed blocks of 1024
// (model/fit/group_moves.cpp), so a state of several blocks per side shows
// whether the team size reaches the bits.
TEST_CASE("the group moves give the same bits on 1 and 2 threads for states of several row blocks") {
    FitOptions o = geweke_options();
    o.rank = 4;
    Rng rng(17);
    for (uint32_t t = 0; t < 3; ++t) {
        const GibbsState start = forward_state(rng, o, 5000, 2500);
        GibbsState one = start, two = start;
        const SweepKey key{41, 0, t};
        apply_group_moves(o, key, one, 1);
        apply_group_moves(o, key, two, 2);
        CHECK(one.user_factors == two.user_factors);
        CHECK(one.item_factors == two.item_factors);
        CHECK(one.user_bias == two.user_bias);
        CHECK(one.item_bias == two.item_bias);
        CHECK(one.user_mu == two.user_mu);
        CHECK(one.item_lambda == two.item_lambda);
        CHECK(one.user_factors != start.user_factors);
    }
}

// The scalings and shears are composed into one matrix per side and the
// factors moved once; moving each column one map at a time in double (as
// the maps are defined in model/fit/group_moves.hpp) must land on the same
// factors up to float32 rounding. Tolerance: each factor is rounded once
// (relative 6e-8) and the double sums of the composition differ from the
// step-by-step ones by about K(K - 1) rounding errors of 1.1e-16 scaled by
// the map's entries (a few units here); 1e-5 relative with a 1e-5 margin
// for entries near zero is far above both and far below any wrong step
// (one shear left out moves a coordinate by |c| times another, about 0.1).
TEST_CASE("the composed factor map moves the factors as the scalings and shears one at a time would") {
    FitOptions o = geweke_options();
    o.rank = 6;
    Rng rng(23);
    const GibbsState start = forward_state(rng, o, 50, 40);
    const uint32_t K = start.rank;
    GibbsState mapped = start;
    FactorMap map = identity_factor_map(K);
    // Step by step in double: U[:, k] *= s, V[:, k] /= s; U[:, i] += c U[:, j], V[:, j] -= c V[:, i].
    std::vector<double> u(start.user_factors.begin(), start.user_factors.end());
    std::vector<double> v(start.item_factors.begin(), start.item_factors.end());
    for (uint32_t k = 0; k < K; ++k) {
        const double s = 0.7 + 0.2 * k;
        scale_factor_axis(mapped, map, k, s);
        for (size_t r = 0; r < u.size(); r += K) u[r + k] *= s;
        for (size_t r = 0; r < v.size(); r += K) v[r + k] /= s;
    }
    for (uint32_t i = 0; i < K; ++i)
        for (uint32_t j = 0; j < K; ++j) {
            if (i == j) continue;
            const double c = 0.1 * rng.normal();
            shear_factor_axes(mapped, map, i, j, c);
            for (size_t r = 0; r < u.size(); r += K) u[r + i] += c * u[r + j];
            for (size_t r = 0; r < v.size(); r += K) v[r + j] -= c * v[r + i];
        }
    // The maps compose without touching the factors.
    CHECK(mapped.user_factors == start.user_factors);
    apply_factor_map(mapped, map, 2);
    for (size_t x = 0; x < u.size(); ++x) CHECK(mapped.user_factors[x] == Approx(u[x]).epsilon(1e-5).margin(1e-5));
    for (size_t x = 0; x < v.size(); ++x) CHECK(mapped.item_factors[x] == Approx(v[x]).epsilon(1e-5).margin(1e-5));
    // Predictions are unchanged by the maps (item = user^-T): U . V before and after.
    for (uint32_t a = 0; a < 50; a += 7)
        for (uint32_t b = 0; b < 40; b += 5)
            CHECK(dot_rows(mapped.user_factors, a, mapped.item_factors, b, K) ==
                  Approx(dot_rows(start.user_factors, a, start.item_factors, b, K)).epsilon(1e-4).margin(1e-4));
}

// Each move broken in turn, the rest of the sampler intact: the sweep runs
// without moves, then the composed moves with one of them wrong. A break is
// detected when some test function's |z| exceeds 6, far beyond the |z| < 4
// every function keeps with the correct sampler above (a correct sampler
// reaches 6 with probability about 1e-7 per function). The last case breaks
// the sweep itself, not a move: its Normal-Wishart update for the factor
// hyperparameters uses nu0 + 1 degrees of freedom while the prior draws use nu0.
// A third kind breaks the overrelaxed row draws: the step past the mean is
// kept but the noise is not shrunk by sqrt(1 - a^2), so each row draw
// widens its conditional instead of keeping it.
TEST_CASE("the Geweke test notices each group move when it is broken, a wrong Wishart degrees of freedom and overrelaxed draws with full noise",
          "[slow]") {
    const FitOptions o = geweke_options();
    FitOptions plain = o;
    plain.group_moves = false;
    const int n = 100000;
    auto broken_run = [&](Broken broken) {
        return geweke_z(
            [&](const GibbsData& data, const SweepKey& key, GibbsState& st) {
                gibbs_sweep(data, plain, key, st, 1);
                composed_moves(o, key, st, broken, 1);
            },
            n, 99);
    };
    const std::pair<Broken, const char*> cases[] = {
        {Broken::scale_w0, "scalings with W0 = 2 w I"},
        {Broken::shear_zero_mean, "shears drawn about 0"},
        {Broken::user_shift_beta0, "user shift with beta0 / 4"},
        {Broken::item_shift_users, "item shift with the user side's mu and Lambda"},
        {Broken::bias_shift_swap, "bias shift with lambda_b and lambda_c swapped"},
    };
    for (const auto& [broken, name] : cases) {
        std::vector<double> z;
        try { z = broken_run(broken); } catch (const std::exception& e) { FAIL_CHECK(name << ": " << e.what()); continue; }
        const auto [largest, where] = worst(z);
        INFO(name << ": largest |z| = " << largest << " (" << where << ")\n" << describe(z));
        CHECK(largest > 6.0);
    }
    FitOptions wrong_dof = o;
    wrong_dof.prior.nu0_minus_rank = o.prior.nu0_minus_rank + 1.0;
    const auto z = geweke_z(
        [&](const GibbsData& data, const SweepKey& key, GibbsState& st) { gibbs_sweep(data, wrong_dof, key, st, 1); },
        n, 99);
    const auto [largest, where] = worst(z);
    INFO("Wishart with nu0 + 1: largest |z| = " << largest << " (" << where << ")\n" << describe(z));
    CHECK(largest > 6.0);

    REQUIRE(o.overrelaxation != 0.0);
    const RowDrawRule full_noise{o.overrelaxation, 1.0};
    const auto zo = geweke_z(
        [&](const GibbsData& data, const SweepKey& key, GibbsState& st) { gibbs_sweep(data, o, full_noise, key, st, 1); },
        n, 99);
    const auto [largest_o, where_o] = worst(zo);
    INFO("overrelaxed row draws with noise scale 1: largest |z| = " << largest_o << " (" << where_o << ")\n"
                                                                       << describe(zo));
    CHECK(largest_o > 6.0);
}

// Table values of the chi-square distribution's upper quantiles (recalled
// from memory; any statistics table lists them): 3.8415 for 1 degree of
// freedom at 0.05; 16.919, 21.666 and 27.877 for 9 degrees of freedom at
// 0.05, 0.01 and 0.001. With 2 degrees of freedom the survival is exp(-x/2).
TEST_CASE("the chi-square p-value of the rank test agrees with the tables") {
    CHECK(chi_square_survival(3.8415, 1) == Approx(0.05).epsilon(1e-4));
    CHECK(chi_square_survival(16.919, 9) == Approx(0.05).epsilon(1e-4));
    CHECK(chi_square_survival(21.666, 9) == Approx(0.01).epsilon(1e-4));
    CHECK(chi_square_survival(27.877, 9) == Approx(0.001).epsilon(1e-3));
    CHECK(chi_square_survival(5.0, 2) == Approx(std::exp(-2.5)).epsilon(1e-12));
    CHECK(chi_square_survival(0.0, 9) == Approx(1.0).epsilon(1e-12));
    // And the histogram: ranks 0..99 into 10 bins of 10.
    std::vector<int> ranks;
    for (int r = 0; r <= 99; ++r) ranks.push_back(r);
    const RankHistogram flat = rank_histogram(ranks, 99, 10);
    CHECK(flat.counts == std::vector<int>(10, 10));
    CHECK(flat.chi_square == 0.0);
    ranks.assign(100, 99);
    CHECK(rank_histogram(ranks, 99, 10).counts.back() == 100);
}

// 500 replications: 50 expected per bin, so a bin's count has sd about 6.7
// (13% of its expectation); the chi-square test with 9 degrees of freedom
// at p > 0.01 (statistic < 21.67) then flags a pattern such as one bin 40%
// high. Each quantity is tested separately, so a correct sampler fails one
// of the six with probability about 6%; the seeds are fixed.
constexpr int sbc_replications = 500;

TEST_CASE("simulation-based calibration: ranks of the noise precision, mu_U . mu_V and predictions are uniform", "[slow]") {
    const SbcResult sbc = run_sbc(sbc_replications, 424242, fit_for_sbc);
    for (size_t q = 0; q < sbc_quantity_count; ++q) {
        const RankHistogram h = rank_histogram(sbc.ranks[q], sbc_draws, 10);
        INFO(sbc_names[q] << ": " << show(h) << "; mean bulk-ESS / L " << sbc.ess_ratio[q]);
        CHECK(h.p_value > 0.01);
        // Nearly independent draws, as the thinning above promises (measured
        // 0.83 for tau, 0.95 or more for the rest).
        CHECK(sbc.ess_ratio[q] > 0.7);
    }
}

// The same check on a sampler with one move broken: the item shift computes
// its conditional from the user side's (mu, Lambda), a plausible slip between
// two mirror-image moves. Its draws look healthy (the ESS is as high) but
// the ranks of mu_U . mu_V pile up at the high end. p < 0.001 happens to a
// correct sampler one time in a thousand. (The Geweke test above notices
// every broken move; SBC, which looks only at these six quantities, does
// not: mu_U . mu_V, predictions and the covariance product are unchanged by
// the scalings and shears, and predictions by every move. Measured with 400
// replications, only this break and the shears drawn about 0 (covariance
// product, p = 0.0003) reached p < 0.01.)
TEST_CASE("simulation-based calibration notices a broken group move", "[slow]") {
    const SbcResult sbc = run_sbc(sbc_replications, 424242, [](const RatingSet& ratings, int rep) {
        return fit_with_moves(ratings, rep, Broken::item_shift_users);
    });
    const RankHistogram h = rank_histogram(sbc.ranks[1], sbc_draws, 10);
    INFO(sbc_names[1] << " with a broken item shift: " << show(h));
    CHECK(h.p_value < 0.001);
}

// The control for the check above: with no move broken, the sweep-by-sweep
// driver is fit_bpmf's chain (same streams, same start), so its draws equal
// fit_for_sbc's up to the float rounding of stored samples, and the break
// alone makes the difference.
TEST_CASE("the SBC driver with every move intact reproduces fit_bpmf's draws") {
    Rng rng(424242);
    for (int rep = 0; rep < 3; ++rep) {
        const SbcReplication r = draw_sbc_replication(rng, sbc_options());
        const auto product = fit_for_sbc(r.ratings, rep), driven = fit_with_moves(r.ratings, rep, Broken::none);
        REQUIRE(product.size() == driven.size());
        for (size_t l = 0; l < product.size(); ++l)
            for (size_t q = 0; q < sbc_quantity_count; ++q) {
                INFO("replication " << rep << ", draw " << l << ", " << sbc_names[q]);
                // float32 storage: relative rounding 6e-8, amplified a little by the inverses.
                CHECK(driven[l][q] == Approx(product[l][q]).epsilon(1e-5).margin(1e-6));
            }
    }
}

// ---- Coverage on known truth: data drawn from the model by the testing
// library's simulator (tests/support/simulate.hpp), whose factors are iid
// Normal(0, fsd^2) per coordinate, fsd^2 = factor_sd^2 / sqrt(K), so the
// population covariances are Sigma_U = Sigma_V = fsd^2 I, and the noise sd
// is noise_sd. Each replication draws new factors, biases, pattern and noise.
//
// Which factor covariance trace is identified: the likelihood depends on
// the factors only through U_u . V_i, which every map U -> A U, V -> A^-T V
// (A in GL(K)) leaves unchanged, carrying Sigma_U -> A Sigma_U A^T and
// Sigma_V -> A^-T Sigma_V A^-1. tr(Sigma_U) = tr(Lambda_U^-1) alone is not
// invariant (A = 2 I multiplies it by 4 and tr(Sigma_V) by 1/4), so the data
// cannot tell it apart from any other split of the scale between the two
// sides: its posterior is set by the prior's W0 along that direction, and the
// simulator's even split is a convention, not a truth to cover.
// tr(Sigma_U Sigma_V) = tr(Lambda_U^-1 Lambda_V^-1) is invariant (the A's
// cancel under the trace) and is what the data identify: for zero-mean
// factors it is the variance of the interaction U_u . V_i. Its true value
// here is K fsd^4 = factor_sd^4. That is the trace checked.
// Equal-tailed interval check: whether `truth` lies between the 5% and 95%
// quantiles of the draws (linear interpolation between order statistics).
bool inside_90(std::vector<double> x, double truth) {
    std::sort(x.begin(), x.end());
    auto q = [&](double pr) {
        const double h = double(x.size() - 1) * pr;
        const size_t k = size_t(h);
        return x[k] + (h - double(k)) * (x[std::min(k + 1, x.size() - 1)] - x[k]);
    };
    return q(0.05) <= truth && truth <= q(0.95);
}

// 600 replications of 100 customers x 80 products at density 0.25 (about
// 2,000 ratings), rank 2, noise sd 0.5, biases sd 0.3; one chain of 60
// burn-in sweeps and 150 kept draws, thin 2 (bulk-ESS about 125 for the
// noise sd and 140 for the product, so the interval ends carry little Monte
// Carlo error). Each replication covers or not, independently: a calibrated
// interval's coverage has standard error sqrt(0.9 * 0.1 / 600) = 0.012, and
// the band 0.90 +- 2 SE is 0.876..0.924 (a correct sampler leaves it with
// probability about 5% per quantity; the seeds are fixed).
TEST_CASE("90% credible intervals of the noise sd and of tr(Lambda_U^-1 Lambda_V^-1) cover the truth 90% of the time", "[slow]") {
    const int replications = 600;
    const uint32_t K = 2, kept = 150;
    const double factor_sd = 1.0, noise_sd = 0.5;
    const double true_cov_product = std::pow(factor_sd, 4.0);
    const double true_user_trace = K * factor_sd * factor_sd / std::sqrt(double(K));
    int noise_inside = 0, product_inside = 0, user_trace_inside = 0;
    double seconds = 0.0, noise_ess = 0.0, product_ess = 0.0;
    for (int rep = 0; rep < replications; ++rep) {
        const SimulatedData d = simulate_ratings({.users = 100, .items = 80, .rank = K, .density = 0.25,
                                                  .noise_sd = noise_sd, .factor_sd = factor_sd, .bias_sd = 0.3,
                                                  .seed = 19000 + uint64_t(rep)});
        const FitOptions o{.rank = K, .run_length = RunLength::fixed, .samples = kept, .burn_in = 60, .thin = 2,
                           .chains = 1, .seed = 700 + uint64_t(rep), .threads = 1};
        const FitResult fit = fit_bpmf(d.ratings, o);
        seconds += fit.seconds;
        const Posterior& p = fit.posterior;
        std::vector<double> noise, product, user_trace;
        for (uint32_t s = 0; s < p.num_samples; ++s) {
            noise.push_back(1.0 / std::sqrt(double(p.noise_precision[s])));
            Eigen::Matrix2d lu, lv;
            for (uint32_t a = 0; a < K; ++a)
                for (uint32_t b = 0; b < K; ++b) {
                    lu(a, b) = p.user_lambda[(s * K + a) * K + b];
                    lv(a, b) = p.item_lambda[(s * K + a) * K + b];
                }
            product.push_back(factor_cov_product(lu, lv));
            user_trace.push_back(lu.inverse().trace());
        }
        noise_ess += convergence(ChainDraws{noise}).ess_bulk / replications;
        product_ess += convergence(ChainDraws{product}).ess_bulk / replications;
        noise_inside += inside_90(noise, noise_sd);
        product_inside += inside_90(product, true_cov_product);
        user_trace_inside += inside_90(user_trace, true_user_trace);
    }
    const double se = std::sqrt(0.9 * 0.1 / replications);
    const double noise_coverage = double(noise_inside) / replications;
    const double product_coverage = double(product_inside) / replications;
    INFO("coverage: noise sd " << noise_coverage << ", tr(Lambda_U^-1 Lambda_V^-1) " << product_coverage
                               << " (SE " << se << "); tr(Lambda_U^-1), not identified and not checked, "
                               << double(user_trace_inside) / replications << "; mean bulk-ESS " << noise_ess
                               << " and " << product_ess << " of " << kept << " draws; fits took " << seconds << " s");
    CHECK(std::abs(noise_coverage - 0.9) < 2.0 * se);
    CHECK(std::abs(product_coverage - 0.9) < 2.0 * se);
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

TEST_CASE("when the noise precision mixes slowest the advice names compare --ranks, and the smaller rank it "
          "suggests converges within the budget the larger one ran out of") {
    // Two taste dimensions, about 15 ratings per customer: at rank 8 the six
    // spare dimensions fit noise and the noise precision crawls (model/fit/MIXING.md).
    const SimulatedData d = simulate_ratings(SimulationOptions{
        .users = 600, .items = 300, .rank = 2, .ratings_per_user = 15, .noise_sd = 0.8, .bias_sd = 0.3, .seed = 11});
    // Measured with no budget: 5,649 sweeps per chain at rank 8, 605 at rank 2.
    const uint32_t budget = 1000;
    const FitResult wide = fit_bpmf(d.ratings, FitOptions{.rank = 8, .samples = 50, .max_sweeps = budget});
    REQUIRE(wide.convergence.verdict == "not_converged");
    CHECK(wide.stop_reason == StopReason::max_sweeps);
    const auto& advice = wide.convergence.advice;
    const auto names_rank = std::find_if(advice.begin(), advice.end(), [](const std::string& a) {
        return a.find("noise precision mixes slowest") != std::string::npos &&
               a.find("--rank (now 8)") != std::string::npos &&
               a.find("credence compare --ranks 2,4,8") != std::string::npos;
    });
    INFO("advice: " << (advice.empty() ? std::string("none") : advice.back()));
    CHECK(names_rank != advice.end());
    // Following it: the rank the data carry meets every target inside the same budget.
    const FitResult narrow = fit_bpmf(d.ratings, FitOptions{.rank = 2, .samples = 50, .max_sweeps = budget});

    CHECK(narrow.convergence.verdict == "converged");
    CHECK(narrow.sweeps_per_chain < budget);
    CHECK(narrow.convergence.advice.empty());
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
    CHECK(meta["kernels"] == cpu_level_name(active_cpu_level()));
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
