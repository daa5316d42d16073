#include "model/fit/sampler.hpp"

#include <malloc.h>
#include <omp.h>

#include <algorithm>
#include <atomic>
#include <chrono>
#include <cmath>
#include <condition_variable>
#include <exception>
#include <memory>
#include <mutex>
#include <stdexcept>
#include <string>
#include <thread>

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include "model/data/product_means.hpp"
#include "model/error.hpp"
#include "model/fit/convergence_monitor.hpp"
#include "model/fit/gibbs_sweep.hpp"
#include "model/fit/sparse.hpp"
#include "model/fit/warm_start.hpp"
#include "model/math/cpu_level.hpp"

namespace credence {

namespace {

// An option value the sampler cannot work with: the user's to fix. The
// message names the flag; the command in front of it adds its own name.
void require_option(bool ok, const std::string& message) {
    if (!ok) throw OptionError(message);
}

// A broken promise of the caller (see fit_bpmf in model/fit/sampler.hpp).
void require_input(bool ok, const std::string& message) {
    if (!ok) throw std::invalid_argument("fit_bpmf: " + message);
}

bool positive_finite(double v) { return v > 0.0 && std::isfinite(v); }

}  // namespace

// Options come from the command line (fit, compare); the flag is named
// where there is one.
void check_fit_options(const FitOptions& o) {
    require_option(o.rank > 0, "--rank must be at least 1");
    require_option(o.samples > 0, "--samples must be at least 1");
    require_option(o.thin > 0, "--thin must be at least 1");
    require_option(o.chains > 0, "--chains must be at least 1");
    require_option(uint64_t(o.burn_in) + uint64_t(o.samples) * o.thin < (uint64_t(1) << 32),
                   "--burn-in + --samples x --thin must stay below 2^32 sweeps per chain");
    if (o.run_length == RunLength::converged) {
        require_option(uint64_t(o.max_sweeps) >= 2 * uint64_t(o.samples),
                       "--max-sweeps must be at least 2 x --samples (the first checkpoint)");
        require_option(o.max_seconds >= 0.0 && std::isfinite(o.max_seconds),
                       "--time-limit must be a finite number of seconds (0: none)");
    }
    require_option(o.convergence.max_rhat >= 1.0 && std::isfinite(o.convergence.max_rhat),
                   "the R-hat target must be a finite number of at least 1");
    require_option(o.convergence.min_ess_per_chain >= 0.0 && std::isfinite(o.convergence.min_ess_per_chain),
                   "the ESS target must be a finite number of at least 0");
    require_option(o.overrelaxation > -1.0 && o.overrelaxation < 1.0,
                   "the overrelaxation coefficient must lie strictly between -1 and 1");
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

namespace {

nlohmann::json options_json(const FitOptions& o) {
    return {{"rank", o.rank},
            {"run_length", o.run_length == RunLength::converged ? "converged" : "fixed"},
            {"max_sweeps", o.max_sweeps},
            {"max_seconds", o.max_seconds},
            {"target_rhat", o.convergence.max_rhat},
            {"target_ess_per_chain", o.convergence.min_ess_per_chain},
            {"group_moves", o.group_moves},
            {"overrelaxation", o.overrelaxation},
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

// Appends the state to the posterior as its next kept sample.
void append_sample(const GibbsState& st, uint32_t chain, Posterior& post) {
    const size_t K = post.rank;
    auto append = [](std::vector<float>& to, const auto& from) { to.insert(to.end(), from.begin(), from.end()); };
    post.sample_chain.push_back(chain);
    append(post.user_factors, st.user_factors);
    append(post.item_factors, st.item_factors);
    if (post.has_biases) {
        append(post.user_bias, st.user_bias);
        append(post.item_bias, st.item_bias);
        post.user_bias_precision.push_back(float(st.user_bias_precision));
        post.item_bias_precision.push_back(float(st.item_bias_precision));
    }
    post.noise_precision.push_back(float(st.noise_precision));
    for (size_t a = 0; a < K; ++a) {
        post.user_mu.push_back(float(st.user_mu[a]));
        post.item_mu.push_back(float(st.item_mu[a]));
    }
    for (size_t a = 0; a < K; ++a)
        for (size_t b = 0; b < K; ++b) {
            post.user_lambda.push_back(float(st.user_lambda(a, b)));
            post.item_lambda.push_back(float(st.item_lambda(a, b)));
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

// An empty posterior of the fit's shape: ids and scale. The per-sample
// arrays and the rated-items lists are filled after the run (keep_samples),
// so they never sit beside the chains' kept draws.
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
}

// ---- the run: chains, the sweeps they keep, checkpoints

// One kept state and the sweep it came from.
struct Draw {
    uint32_t sweep = 0;
    GibbsState state;
};

// Which sweeps a chain keeps: j >= begin with (j + 1 - offset) a multiple of
// spacing. Converged runs align to absolute sweep numbers (offset 0), so the
// draws kept for one checkpoint contain those of any later one whose spacing
// is a multiple; fixed runs keep every thin-th sweep after burn-in.
struct KeepRule {
    uint32_t begin = 0;
    uint32_t spacing = 1;
    uint32_t offset = 0;
    bool keeps(uint32_t j) const { return j >= begin && (j + 1 - offset) % spacing == 0; }
};

// The burn-in of a converged run that has reached n sweeps per chain: its
// first quarter, or `cap` sweeps if fewer (a warm start; see the header).
// The rest, [begin, n), is the window assessed and kept from. A start that
// is still drifting in the window shows in the split R-hat (each chain's
// halves disagree), so the run goes on rather than stops early; a shorter
// burn-in than the common first half means fewer sweeps for the same window.
uint32_t window_begin(uint32_t n, uint32_t cap) { return std::min(n / 4, cap); }

// Sweeps j in [window_begin(n, cap), n) with (j + 1) a multiple of t.
uint32_t kept_in_window(uint32_t n, uint32_t t, uint32_t cap) { return n / t - window_begin(n, cap) / t; }

// The keep rule for a converged-run checkpoint at n sweeps: the window is
// [window_begin(n, cap), n); the spacing is the largest power of two that
// still leaves `samples` draws in it (so between samples and 2 x samples + 1
// are held).
KeepRule window_rule(uint32_t n, uint32_t samples, uint32_t cap) {
    uint32_t t = 1;
    while (kept_in_window(n, 2 * t, cap) >= samples) t *= 2;
    return {window_begin(n, cap), t, 0};
}

// The next checkpoint after n: a quarter further (rounded up), within the
// budget, so a run overshoots the sweeps it needed by at most a quarter.
uint32_t next_checkpoint(uint32_t n, uint32_t max_sweeps) {
    const uint64_t next = std::max<uint64_t>(uint64_t(n) + 1, (uint64_t(n) * 5 + 3) / 4);
    return static_cast<uint32_t>(std::min<uint64_t>(next, max_sweeps));
}

struct Chain {
    uint32_t index = 0;
    GibbsState state;
    std::vector<Draw> draws;     // kept so far, in sweep order
    SweepTrace trace;            // every sweep of this chain
    std::atomic<uint32_t> done{0};
    std::atomic<float> train_rmse{-1.0f};
    double seconds = 0.0;        // wall time spent sweeping
};

struct RunContext {
    const GibbsData& data;
    const FitOptions& options;
    ConvergenceMonitor& monitor;
    uint64_t nnz = 0;
    int team = 1;                // OpenMP threads per chain
    uint32_t burn_in_cap = UINT32_MAX;  // converged runs: at most this burn-in (warm starts)
};

// Sweeps [from, to) of one chain, recording each and keeping what `rule` says.
void run_chain(RunContext& run, Chain& c, uint32_t from, uint32_t to, const KeepRule& rule) {
    const auto start = std::chrono::steady_clock::now();
    for (uint32_t j = from; j < to; ++j) {
        gibbs_sweep(run.data, run.options, SweepKey{run.options.seed, c.index, j}, c.state, run.team);
        run.monitor.record(c.index, j, c.state);
        const double rmse = std::sqrt(c.state.sse / double(run.nnz));
        c.trace.chain.push_back(c.index);
        c.trace.sweep.push_back(j);
        c.trace.noise_precision.push_back(float(c.state.noise_precision));
        c.trace.train_rmse.push_back(float(rmse));
        if (rule.keeps(j)) c.draws.push_back({j, c.state});
        c.train_rmse.store(float(rmse));
        c.done.store(j + 1);
    }
    c.seconds += std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count();
}

// Runs every chain through sweep `to` on `parallel` worker threads (chain c
// on worker c % parallel), while the calling thread reports progress every
// 200 ms. Rethrows the first failure by chain order once all have stopped.
void run_segment(RunContext& run, std::vector<std::unique_ptr<Chain>>& chains, uint32_t from, uint32_t to,
                 const KeepRule& rule, uint32_t parallel, const std::function<void(FitProgress)>& report,
                 FitProgress progress) {
    std::vector<std::exception_ptr> failures(chains.size());
    std::mutex mutex;  // guards finished
    std::condition_variable finished_changed;
    uint32_t finished = 0;
    std::vector<std::thread> workers;
    for (uint32_t w = 0; w < parallel; ++w)
        workers.emplace_back([&, w] {
            for (size_t c = w; c < chains.size(); c += parallel) {
                try {
                    run_chain(run, *chains[c], from, to, rule);
                } catch (...) {
                    failures[c] = std::current_exception();
                }
            }
            std::lock_guard lock(mutex);
            ++finished;
            finished_changed.notify_all();
        });
    {
        std::unique_lock lock(mutex);
        while (!finished_changed.wait_for(lock, std::chrono::milliseconds(200), [&] { return finished == parallel; })) {
            if (!report) continue;
            lock.unlock();
            uint32_t done = to;
            for (const auto& c : chains) done = std::min(done, c->done.load());
            progress.sweeps_done = done;
            progress.train_rmse = chains.front()->train_rmse.load();
            report(progress);
            lock.lock();
        }
    }
    for (auto& t : workers) t.join();
    for (auto& f : failures)
        if (f) std::rethrow_exception(f);
}

// RMSE on the validation set of the mean prediction over the draws held.
double validation_rmse(const std::vector<std::unique_ptr<Chain>>& chains, double g, const std::vector<Rating>& v) {
    std::vector<double> sum(v.size(), 0.0);
    size_t count = 0;
    for (const auto& c : chains)
        for (const Draw& d : c->draws) {
            ++count;
            for (size_t r = 0; r < v.size(); ++r) sum[r] += state_prediction(d.state, g, v[r].user, v[r].item);
        }
    if (count == 0 || v.empty()) return -1.0;
    double se = 0.0;
    for (size_t r = 0; r < v.size(); ++r) se += std::pow(v[r].value - sum[r] / double(count), 2);
    return std::sqrt(se / double(v.size()));
}

// The worst quantities of a summary, for progress lines.
void describe_worst(const ConvergenceSummary& c, FitProgress& p) {
    p.max_rhat = c.max_rhat;
    p.min_ess_per_chain = std::min(c.min_ess_bulk_per_chain, c.min_ess_tail_per_chain);
    double worst_ess = INFINITY;
    for (const auto& q : c.quantities) {
        if (q.stats.rhat == c.max_rhat) p.worst_rhat = q.label();
        const double ess = std::min(q.stats.ess_bulk, q.stats.ess_tail) / std::max(1u, c.num_chains);
        if (ess < worst_ess) {
            worst_ess = ess;
            p.worst_ess = q.label();
        }
    }
}

// Sweeps per chain a run would need for every quantity of `c` (assessed on
// the window [n/4, n)) to reach the ESS target, if ESS grows in proportion
// to the window: 4/3 x window x target / ESS, at least 1.5 x n when only R-hat
// fails. A planning figure, rounded up to a hundred, not a promise.
uint64_t sweeps_needed(const ConvergenceSummary& c, uint32_t n) {
    const double window = double(c.draws_per_chain);
    double needed = n;
    for (const auto& q : c.quantities) {
        const double ess = std::min(q.stats.ess_bulk, q.stats.ess_tail) / std::max(1u, c.num_chains);
        if (ess < c.options.min_ess_per_chain && ess > 0.0)
            needed = std::max(needed, 4.0 / 3.0 * window * c.options.min_ess_per_chain / ess);
        if (q.stats.rhat > c.options.max_rhat) needed = std::max(needed, 1.5 * n);
    }
    return static_cast<uint64_t>(std::ceil(1.2 * needed / 100.0) * 100.0);
}

// True when the noise precision is the quantity furthest from the ESS
// target or the R-hat target (the one a rank nearer the data's own speeds
// up: model/fit/MIXING.md), as the progress line names them.
bool slowest_is_noise_precision(const ConvergenceSummary& c) {
    FitProgress worst;
    describe_worst(c, worst);
    return (worst.min_ess_per_chain < c.options.min_ess_per_chain && worst.worst_ess == "noise_precision") ||
           (worst.max_rhat > c.options.max_rhat && worst.worst_rhat == "noise_precision");
}

// The ranks to compare against `rank` (>= 2): a quarter of it (when at least
// 1), a half and itself, comma-separated ("4,8,16" for 16, "1,2" for 2).
std::string smaller_ranks(uint32_t rank) {
    std::string out;
    for (uint32_t r : {rank / 4, rank / 2})
        if (r >= 1) out += std::to_string(r) + ",";
    return out + std::to_string(rank);
}

// What to do when a run ends without meeting the targets; every piece of
// advice names the option and the direction that helps.
std::vector<std::string> advice_for(const ConvergenceSummary& c, StopReason stop, const FitOptions& o, uint32_t n,
                                    double seconds) {
    if (c.verdict == "converged") return {};
    std::vector<std::string> advice;
    const uint64_t needed = sweeps_needed(c, n);
    switch (stop) {
        case StopReason::max_sweeps:
            advice.push_back(fmt::format(
                "the budget of {} sweeps per chain ran out; at the rate measured, about {} would meet the "
                "targets: rerun with --max-sweeps {}",
                o.max_sweeps, needed, needed));
            break;
        case StopReason::time_limit:
            advice.push_back(fmt::format(
                "the time limit of {:.0f} s ran out after {} sweeps per chain; about {} sweeps would meet the "
                "targets, roughly {:.0f} s at this speed: rerun with --time-limit {:.0f}",
                o.max_seconds, n, needed, seconds * double(needed) / n, std::ceil(1.2 * seconds * double(needed) / n)));
            break;
        case StopReason::fixed_length:
            advice.push_back(fmt::format(
                "this fixed-length run had {} sweeps per chain after burn-in; about {} would meet the targets: "
                "drop --run-length fixed to let the fit run until they are met, or raise --thin to about {} "
                "(more sweeps between kept draws, same file size)",
                n - o.burn_in, needed / 2, (needed / 2 + o.samples - 1) / o.samples));
            break;
        case StopReason::converged:
            break;
    }
    if (c.max_rhat > c.options.max_rhat && stop == StopReason::fixed_length)
        advice.push_back(fmt::format("R-hat {:.3f} also says the chains have not forgotten their starts: raise "
                                     "--burn-in (now {})",
                                     c.max_rhat, o.burn_in));
    if (o.rank >= 2 && slowest_is_noise_precision(c))
        advice.push_back(fmt::format(
            "the noise precision mixes slowest: when --rank (now {}) exceeds the taste dimensions the ratings "
            "carry, the spare dimensions fit noise and slow it down; `credence compare "
            "--ranks {}` shows which rank predicts best held out, and near the ratings' own rank the noise "
            "precision mixes much faster",
            o.rank, smaller_ranks(o.rank)));
    return advice;
}

struct FitTimings {
    double setup_s = 0.0;
    nlohmann::json chain_s = nlohmann::json::array();  // each chain's sweeping time
    double sampling_s = 0.0;                            // wall time of all sweeping
};

struct RunRecord {
    RunLength mode = RunLength::converged;
    StopReason stop = StopReason::fixed_length;
    uint32_t sweeps = 0;            // per chain
    KeepRule rule;
    uint32_t parallel_chains = 1;
    uint32_t burn_in = 0;           // sweeps per chain discarded
    std::vector<uint32_t> checkpoints;
};

// Posterior::fit_metadata_json: options, data shape, run length, timings and
// the per-sweep trace.
nlohmann::json fit_metadata(const FitOptions& options, const CsrMatrix& by_user, const Posterior& post, double g,
                            const RunRecord& run, const FitResult& result, const FitTimings& timings) {
    nlohmann::json meta;
    meta["options"] = options_json(options);
    meta["seed"] = options.seed;
    // The row kernels' CPU level: x86-64-v3 and v4 draw the same bits, the
    // baseline differs from them by rounding (model/fit/row_kernels.hpp).
    meta["kernels"] = cpu_level_name(active_cpu_level());
    meta["data"] = {{"ratings", by_user.nnz()}, {"users", post.num_users}, {"items", post.num_items}, {"global_mean", g}};
    meta["sweeps_per_chain"] = run.sweeps;
    meta["kept_samples"] = post.num_samples;
    meta["run_length"] = {{"mode", run.mode == RunLength::converged ? "converged" : "fixed"},
                          {"stop_reason", stop_reason_name(run.stop)},
                          {"sweeps_per_chain", run.sweeps},
                          {"burn_in", run.burn_in},
                          {"checkpoints", run.checkpoints},
                          {"parallel_chains", run.parallel_chains}};
    meta["timings"] = {{"setup_s", timings.setup_s},
                       {"chain_s", timings.chain_s},
                       {"sampling_s", timings.sampling_s},
                       {"seconds_per_sweep", timings.sampling_s / std::max(1u, run.sweeps)},
                       {"total_s", result.seconds}};
    meta["trace"] = {{"chain", result.trace.chain},
                     {"sweep", result.trace.sweep},
                     {"noise_precision", result.trace.noise_precision},
                     {"train_rmse", result.trace.train_rmse}};
    return meta;
}

// Moves `samples` draws of each chain (evenly spread: draw k * n / samples
// of n, all of them when n == samples; chain by chain, in sweep order) into the posterior's per-sample arrays. The draws not kept
// are released first and each kept one as soon as it is copied, so a kept
// sample is never held twice (peak memory: the draws plus one state).
void keep_samples(std::vector<std::unique_ptr<Chain>>& chains, uint32_t samples, Posterior& post) {
    std::vector<std::vector<Draw>> kept(chains.size());
    for (size_t c = 0; c < chains.size(); ++c) {
        std::vector<Draw>& draws = chains[c]->draws;
        // Moved out, or copied while a later pick is the same draw.
        const size_t n = draws.size();
        for (size_t k = 0; k < samples; ++k) {
            const size_t at = k * n / samples;
            if (k + 1 < samples && (k + 1) * n / samples == at) kept[c].push_back(draws[at]);
            else kept[c].push_back(std::move(draws[at]));
        }
        std::vector<Draw>().swap(draws);
    }
    const size_t S = post.num_samples, U = post.num_users, I = post.num_items, K = post.rank;
    post.sample_chain.reserve(S);
    post.user_factors.reserve(S * U * K);
    post.item_factors.reserve(S * I * K);
    if (post.has_biases) {
        post.user_bias.reserve(S * U);
        post.item_bias.reserve(S * I);
    }
    for (size_t c = 0; c < chains.size(); ++c)
        for (Draw& d : kept[c]) {
            append_sample(d.state, chains[c]->index, post);
            d.state = GibbsState{};
            // The draws were allocated in the chains' threads, in arenas
            // that keep freed pages; hand them back before the next copy.
            malloc_trim(0);
        }
}

// Runs the chains to a verdict: fixed length, or checkpoint by checkpoint.
RunRecord run_chains(RunContext& run, std::vector<std::unique_ptr<Chain>>& chains, uint32_t parallel,
                     const std::vector<Rating>* validation, double g, std::chrono::steady_clock::time_point start,
                     const std::function<void(const FitProgress&)>& on_progress, ConvergenceSummary& summary) {
    const FitOptions& o = run.options;
    RunRecord rec;
    rec.mode = o.run_length;
    rec.parallel_chains = parallel;
    auto elapsed = [&] { return std::chrono::duration<double>(std::chrono::steady_clock::now() - start).count(); };
    FitProgress progress;
    progress.chains = o.chains;
    progress.parallel_chains = parallel;
    std::function<void(FitProgress)> report;
    if (on_progress)
        report = [&](FitProgress p) {
            p.elapsed_s = elapsed();
            on_progress(p);
        };

    if (o.run_length == RunLength::fixed) {
        rec.sweeps = o.burn_in + o.samples * o.thin;
        rec.rule = {o.burn_in, o.thin, o.burn_in};
        rec.burn_in = o.burn_in;
        progress.next_checkpoint = progress.max_sweeps = rec.sweeps;
        run.monitor.drop_before(o.burn_in);
        run_segment(run, chains, 0, rec.sweeps, rec.rule, parallel, report, progress);
        summary = run.monitor.assess(o.burn_in, rec.sweeps);
        rec.stop = StopReason::fixed_length;
        return rec;
    }
    const double sampling_start = elapsed();
    uint32_t from = 0, n = 2 * o.samples;
    for (;;) {
        rec.rule = window_rule(n, o.samples, run.burn_in_cap);
        for (auto& c : chains) std::erase_if(c->draws, [&](const Draw& d) { return !rec.rule.keeps(d.sweep); });
        run.monitor.drop_before(window_begin(n, run.burn_in_cap));
        progress.next_checkpoint = n;
        progress.max_sweeps = o.max_sweeps;
        progress.checkpoint = false;
        run_segment(run, chains, from, n, rec.rule, parallel, report, progress);
        rec.checkpoints.push_back(n);
        summary = run.monitor.assess(window_begin(n, run.burn_in_cap), n);
        rec.burn_in = window_begin(n, run.burn_in_cap);
        if (report) {
            FitProgress p = progress;
            p.sweeps_done = n;
            p.checkpoint = true;
            p.train_rmse = chains.front()->train_rmse.load();
            describe_worst(summary, p);
            if (validation && !validation->empty()) p.validation_rmse = validation_rmse(chains, g, *validation);
            report(p);
        }
        rec.sweeps = n;
        if (summary.verdict == "converged") {
            rec.stop = StopReason::converged;
            break;
        }
        if (n >= o.max_sweeps) {
            rec.stop = StopReason::max_sweeps;
            break;
        }
        const uint32_t next = next_checkpoint(n, o.max_sweeps);
        const double per_sweep = (elapsed() - sampling_start) / n;
        if (o.max_seconds > 0.0 && elapsed() + per_sweep * (next - n) > o.max_seconds) {
            rec.stop = StopReason::time_limit;
            break;
        }
        from = n;
        n = next;
    }
    return rec;
}

}  // namespace

const char* stop_reason_name(StopReason reason) {
    switch (reason) {
        case StopReason::converged: return "converged";
        case StopReason::max_sweeps: return "max_sweeps";
        case StopReason::time_limit: return "time_limit";
        case StopReason::fixed_length: return "fixed_length";
    }
    return "unknown";
}

// A start must give each chain a state of this fit's shape.
void check_start(const WarmStart& start, const FitOptions& o, const CsrMatrix& by_user, const CsrMatrix& by_item) {
    require_input(start.states.size() == o.chains, "the warm start has a state per chain of another fit");
    for (const GibbsState& st : start.states)
        require_input(st.rank == o.rank && st.biases == o.biases &&
                          st.user_factors.size() == size_t(by_user.num_rows) * o.rank &&
                          st.item_factors.size() == size_t(by_item.num_rows) * o.rank &&
                          st.user_bias.size() == (o.biases ? by_user.num_rows : 0) &&
                          st.item_bias.size() == (o.biases ? by_item.num_rows : 0) &&
                          st.user_mu.size() == o.rank && st.item_mu.size() == o.rank,
                      "a warm-start state does not match the training set's shape");
}

FitResult fit_bpmf(const RatingSet& train, const FitOptions& requested, const std::vector<Rating>* validation,
                   const std::function<void(const FitProgress&)>& on_progress, const WarmStart* warm) {
    using clock = std::chrono::steady_clock;
    const auto start = clock::now();
    check_fit_options(requested);
    const FitOptions options = resolve_init_scale(requested, train);
    require_input(!train.ratings.empty(), "the training set is empty");
    const auto by_user = csr_by_user(train);
    require_input(!has_duplicates(by_user), "the training set holds a (user, item) pair twice; ingest merges duplicates");
    const auto by_item = csr_by_item(train);
    if (validation)
        for (const auto& r : *validation)
            require_input(r.user < train.users.size() && r.item < train.items.size(),
                          "a validation rating refers to a user or item outside the training id maps");
    if (warm) check_start(*warm, requested, by_user, by_item);
    const double g = train.mean();
    const GibbsData data{&by_user, &by_item, g};

    FitResult result;
    Posterior& post = result.posterior;
    shape_posterior(train, options, by_user, by_item, g, post);

    const int threads = options.threads > 0 ? options.threads : omp_get_max_threads();
    const uint32_t parallel = std::max<uint32_t>(1, std::min<uint32_t>(options.chains, uint32_t(threads)));
    ConvergenceMonitor monitor(by_user, train.users, train.items, g, options.chains, options.convergence);
    RunContext run{data, options, monitor, by_user.nnz(), std::max(1, threads / int(parallel))};
    if (warm) run.burn_in_cap = warm->burn_in;
    std::vector<std::unique_ptr<Chain>> chains;
    for (uint32_t c = 0; c < options.chains; ++c) {
        chains.push_back(std::make_unique<Chain>());
        chains.back()->index = c;
        chains.back()->state = warm ? warm->states[c] : initial_state(data, options, options.seed, c);
    }
    FitTimings timings;
    timings.setup_s = std::chrono::duration<double>(clock::now() - start).count();

    const RunRecord rec = run_chains(run, chains, parallel, validation, g, start, on_progress, result.convergence);
    timings.sampling_s = std::chrono::duration<double>(clock::now() - start).count() - timings.setup_s;

    keep_samples(chains, options.samples, post);
    post.rated_offsets = by_user.offsets;
    post.rated_items = by_user.index;
    // The trace, chain by chain.
    for (auto& c : chains) {
        timings.chain_s.push_back(c->seconds);
        auto append = [](auto& to, const auto& from) { to.insert(to.end(), from.begin(), from.end()); };
        append(result.trace.chain, c->trace.chain);
        append(result.trace.sweep, c->trace.sweep);
        append(result.trace.noise_precision, c->trace.noise_precision);
        append(result.trace.train_rmse, c->trace.train_rmse);
    }
    result.stop_reason = rec.stop;
    result.sweeps_per_chain = rec.sweeps;
    result.seconds = std::chrono::duration<double>(clock::now() - start).count();
    result.convergence.advice = advice_for(result.convergence, rec.stop, options, rec.sweeps, timings.sampling_s);

    nlohmann::json meta = fit_metadata(options, by_user, post, g, rec, result, timings);
    meta["start"] = warm ? warm->record : nlohmann::json{{"kind", "cold"}};
    meta["baseline"] = to_json(product_mean_baseline(train));
    post.fit_metadata_json = meta.dump();
    post.diagnostics_json = to_json(result.convergence).dump();
    try {
        post.validate();
    } catch (const FormatError& e) {
        throw std::logic_error(std::string("fit_bpmf built an inconsistent posterior: ") + e.what());
    }
    return result;
}

}  // namespace credence
