#include "model/fit/sampler.hpp"

#include <chrono>
#include <cmath>
#include <stdexcept>
#include <string>

#include <nlohmann/json.hpp>

#include "model/error.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/sparse.hpp"

namespace credence {

namespace {

// An option value the sampler cannot work with: the user's to fix.
void require_option(bool ok, const std::string& message) {
    if (!ok) throw OptionError("fit: " + message);
}

// A broken promise of the caller (see fit_bpmf in model/fit/sampler.hpp).
void require_input(bool ok, const std::string& message) {
    if (!ok) throw std::invalid_argument("fit_bpmf: " + message);
}

bool positive_finite(double v) { return v > 0.0 && std::isfinite(v); }

// Options come from the command line (fit, compare); the flag is named
// where there is one.
void validate_options(const FitOptions& o) {
    require_option(o.rank > 0, "--rank must be at least 1");
    require_option(o.samples > 0, "--samples must be at least 1");
    require_option(o.thin > 0, "--thin must be at least 1");
    require_option(o.chains > 0, "--chains must be at least 1");
    require_option(uint64_t(o.burn_in) + uint64_t(o.samples) * o.thin < (uint64_t(1) << 32),
                   "--burn-in + --samples x --thin must stay below 2^32 sweeps per chain");
    require_option(o.threads >= 0, "--threads must be 0 (all cores) or positive");
    require_option(positive_finite(o.fixed_noise_precision), "--fixed-noise-precision must be positive and finite");
    require_option(std::isfinite(o.init_scale), "the init scale must be finite (negative: automatic)");
    const auto& p = o.prior;
    require_option(positive_finite(p.beta0), "the prior's beta0 must be positive and finite");
    require_option(p.nu0_minus_rank > -1.0 && std::isfinite(p.nu0_minus_rank), "the prior's nu0 - rank must exceed -1");
    require_option(positive_finite(p.w0_scale), "the prior's W0 scale must be positive and finite");
    require_option(positive_finite(p.noise_shape) && positive_finite(p.noise_rate),
                   "the noise prior's shape and rate must be positive and finite");
    require_option(positive_finite(p.bias_shape) && positive_finite(p.bias_rate),
                   "the bias prior's shape and rate must be positive and finite");
}

nlohmann::json options_json(const FitOptions& o) {
    return {{"rank", o.rank},
            {"burn_in", o.burn_in},
            {"samples", o.samples},
            {"thin", o.thin},
            {"chains", o.chains},
            {"seed", o.seed},
            {"threads", o.threads},
            {"biases", o.biases},
            {"sample_noise", o.sample_noise},
            {"fixed_noise_precision", o.fixed_noise_precision},
            {"init_scale", o.init_scale},
            {"prior",
             {{"beta0", o.prior.beta0},
              {"nu0_minus_rank", o.prior.nu0_minus_rank},
              {"w0_scale", o.prior.w0_scale},
              {"noise_shape", o.prior.noise_shape},
              {"noise_rate", o.prior.noise_rate},
              {"bias_shape", o.prior.bias_shape},
              {"bias_rate", o.prior.bias_rate}}}};
}

double state_prediction(const GibbsState& st, double g, uint32_t u, uint32_t i) {
    const uint32_t k = st.rank;
    double pred = g;
    if (st.biases) pred += double(st.user_bias[u]) + st.item_bias[i];
    for (uint32_t j = 0; j < k; ++j) pred += double(st.user_factors[size_t(u) * k + j]) * st.item_factors[size_t(i) * k + j];
    return pred;
}

// Copies the state into kept sample s of the posterior.
void keep_sample(const GibbsState& st, uint32_t s, uint32_t chain, Posterior& post) {
    const size_t U = post.num_users, I = post.num_items, K = post.rank;
    post.sample_chain[s] = chain;
    std::copy(st.user_factors.begin(), st.user_factors.end(), post.user_factors.begin() + s * U * K);
    std::copy(st.item_factors.begin(), st.item_factors.end(), post.item_factors.begin() + s * I * K);
    if (post.has_biases) {
        std::copy(st.user_bias.begin(), st.user_bias.end(), post.user_bias.begin() + s * U);
        std::copy(st.item_bias.begin(), st.item_bias.end(), post.item_bias.begin() + s * I);
        post.user_bias_precision[s] = float(st.user_bias_precision);
        post.item_bias_precision[s] = float(st.item_bias_precision);
    }
    post.noise_precision[s] = float(st.noise_precision);
    for (size_t a = 0; a < K; ++a) {
        post.user_mu[s * K + a] = float(st.user_mu[a]);
        post.item_mu[s * K + a] = float(st.item_mu[a]);
        for (size_t b = 0; b < K; ++b) {
            post.user_lambda[(s * K + a) * K + b] = float(st.user_lambda(a, b));
            post.item_lambda[(s * K + a) * K + b] = float(st.item_lambda(a, b));
        }
    }
}

// A start too close to zero leaves the chain near the all-zero saddle for
// many sweeps (seen at rank 16 on 1M ratings: ~170 sweeps at sd 0.1). The
// automatic scale makes the initial u.v carry about half the rating variance:
// K s^4 = var / 2.
FitOptions resolve_init_scale(const FitOptions& o, const RatingSet& train) {
    FitOptions r = o;
    if (r.init_scale >= 0.0) return r;
    const double g = train.mean();
    double ss = 0.0;
    for (const auto& x : train.ratings) ss += (x.value - g) * (x.value - g);
    const double var = train.ratings.empty() ? 0.0 : ss / double(train.ratings.size());
    r.init_scale = var > 0.0 ? std::pow(var / (2.0 * o.rank), 0.25) : 0.1;
    return r;
}

// An empty posterior of the fit's shape: ids, scale, the rated-items lists,
// and every per-sample array sized for keep_sample to fill.
void shape_posterior(const RatingSet& train, const FitOptions& options, const CsrMatrix& by_user,
                     const CsrMatrix& by_item, double g, Posterior& post) {
    const uint32_t U = by_user.num_rows, I = by_item.num_rows, K = options.rank;
    post.rank = K;
    post.num_users = U;
    post.num_items = I;
    post.num_chains = options.chains;
    post.num_samples = options.samples * options.chains;
    post.has_biases = options.biases;
    post.user_ids = train.users.names();
    post.item_ids = train.items.names();
    post.global_mean = float(g);
    post.scale = train.scale;
    const size_t S = post.num_samples;
    post.sample_chain.resize(S);
    post.user_factors.resize(S * U * K);
    post.item_factors.resize(S * I * K);
    if (options.biases) {
        post.user_bias.resize(S * U);
        post.item_bias.resize(S * I);
        post.user_bias_precision.resize(S);
        post.item_bias_precision.resize(S);
    }
    post.noise_precision.resize(S);
    post.user_mu.resize(S * K);
    post.item_mu.resize(S * K);
    post.user_lambda.resize(S * K * K);
    post.item_lambda.resize(S * K * K);
    post.rated_offsets = by_user.offsets;
    post.rated_items = by_user.index;
}

// RMSE on the validation set of the running posterior mean: the mean of the
// kept states so far (`kept_total` of them, summed in `validation_sum`), or
// this sweep's state before the first one is kept. Adds this sweep's
// predictions to the sums when it is kept.
double running_validation_rmse(const GibbsState& st, double g, const std::vector<Rating>& validation, bool kept,
                               uint32_t kept_total, std::vector<double>& validation_sum) {
    double se = 0.0;
    for (size_t v = 0; v < validation.size(); ++v) {
        const Rating& r = validation[v];
        const double pred = state_prediction(st, g, r.user, r.item);
        if (kept) validation_sum[v] += pred;
        const double m = kept_total > 0 ? validation_sum[v] / kept_total : pred;
        se += (r.value - m) * (r.value - m);
    }
    return std::sqrt(se / double(validation.size()));
}

struct FitTimings {
    double setup_s = 0.0;
    nlohmann::json chain_s = nlohmann::json::array();
    double sweeps_s = 0.0;  // all chains' sweeps
};

// Posterior::fit_metadata_json: options, data shape, timings and the
// per-sweep trace.
nlohmann::json fit_metadata(const FitOptions& options, const CsrMatrix& by_user, const Posterior& post, double g,
                            uint32_t sweeps, const FitResult& result, const FitTimings& timings) {
    const size_t S = post.num_samples;
    nlohmann::json meta;
    meta["options"] = options_json(options);
    meta["seed"] = options.seed;
    meta["data"] = {{"ratings", by_user.nnz()}, {"users", post.num_users}, {"items", post.num_items}, {"global_mean", g}};
    meta["sweeps_per_chain"] = sweeps;
    meta["kept_samples"] = S;
    meta["timings"] = {{"setup_s", timings.setup_s},
                       {"chain_s", timings.chain_s},
                       {"seconds_per_sweep", timings.sweeps_s / (double(sweeps) * options.chains)},
                       {"total_s", result.seconds}};
    meta["trace"] = {{"chain", result.trace.chain},
                     {"sweep", result.trace.sweep},
                     {"noise_precision", result.trace.noise_precision},
                     {"train_rmse", result.trace.train_rmse}};
    return meta;
}

}  // namespace

FitResult fit_bpmf(const RatingSet& train, const FitOptions& requested, const std::vector<Rating>* validation,
                   const std::function<void(const SweepReport&)>& on_sweep) {
    using clock = std::chrono::steady_clock;
    const auto start = clock::now();
    validate_options(requested);
    const FitOptions options = resolve_init_scale(requested, train);
    require_input(!train.ratings.empty(), "the training set is empty");
    const auto by_user = csr_by_user(train);
    require_input(!has_duplicates(by_user), "the training set holds a (user, item) pair twice; ingest merges duplicates");
    const auto by_item = csr_by_item(train);
    if (validation)
        for (const auto& r : *validation)
            require_input(r.user < train.users.size() && r.item < train.items.size(),
                          "a validation rating refers to a user or item outside the training id maps");
    const double g = train.mean();
    const GibbsData data{&by_user, &by_item, g};
    const uint32_t sweeps = options.burn_in + options.samples * options.thin;

    FitResult result;
    Posterior& post = result.posterior;
    shape_posterior(train, options, by_user, by_item, g, post);

    std::vector<double> validation_sum(validation ? validation->size() : 0, 0.0);
    uint32_t kept_total = 0;
    FitTimings timings;
    timings.setup_s = std::chrono::duration<double>(clock::now() - start).count();

    for (uint32_t chain = 0; chain < options.chains; ++chain) {
        const auto chain_start = clock::now();
        GibbsState st = initial_state(data, options, options.seed, chain);
        for (uint32_t sweep = 0; sweep < sweeps; ++sweep) {
            gibbs_sweep(data, options, SweepKey{options.seed, chain, sweep}, st, options.threads);
            const bool kept = sweep >= options.burn_in && (sweep - options.burn_in + 1) % options.thin == 0;
            if (kept) keep_sample(st, kept_total++, chain, post);
            const double train_rmse = std::sqrt(st.sse / double(by_user.nnz()));
            result.trace.chain.push_back(chain);
            result.trace.sweep.push_back(sweep);
            result.trace.noise_precision.push_back(float(st.noise_precision));
            result.trace.train_rmse.push_back(float(train_rmse));

            SweepReport report;
            report.chain = chain;
            report.sweep = sweep;
            report.sweeps_per_chain = sweeps;
            report.kept = kept;
            report.noise_precision = st.noise_precision;
            report.train_rmse = train_rmse;
            if (validation && !validation->empty())
                report.validation_rmse = running_validation_rmse(st, g, *validation, kept, kept_total, validation_sum);
            report.elapsed_s = std::chrono::duration<double>(clock::now() - start).count();
            if (on_sweep) on_sweep(report);
        }
        const double cs = std::chrono::duration<double>(clock::now() - chain_start).count();
        timings.sweeps_s += cs;
        timings.chain_s.push_back(cs);
    }
    result.seconds = std::chrono::duration<double>(clock::now() - start).count();

    post.fit_metadata_json = fit_metadata(options, by_user, post, g, sweeps, result, timings).dump();
    try {
        post.validate();
    } catch (const FormatError& e) {
        throw std::logic_error(std::string("fit_bpmf built an inconsistent posterior: ") + e.what());
    }
    return result;
}

}  // namespace credence
