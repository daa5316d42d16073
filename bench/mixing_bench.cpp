// Mixing benchmark (not a test; scripts/bench-mixing drives it).
//
//   mixing_bench --ratings FILE [--scale 1:5] [--holdout 0.1] [--rank K]
//                [--chains 2] [--burn-in 200] [--samples 400] [--thin 1]
//                [--seed 1] [--threads 0] [--moves off,on] [--all-predictions]
//                [--overrelaxation A] [--prior-nu0-minus-rank N] [--prior-w0-scale W]
//                [--trace FILE [--trace-pair CUSTOMER,PRODUCT]] [--converged]
//
// Variants: "off" is the plain Gibbs sweep (no group moves, plain row
// draws), "moves" adds the group moves (FitOptions::group_moves), "on" is the
// sampler as shipped (group moves and overrelaxed row draws,
// FitOptions::overrelaxation). All are runs of the same length, assessed on
// every sweep after burn-in (as the fit's convergence check does).
// Fits the same data once per sampler variant and prints, for the quantities
// the convergence check monitors (model/fit/convergence_summary.hpp), the
// bulk- and tail-ESS (Vehtari et al. 2021) per sweep and per second of
// sampling, and R-hat. "sweeps" counts every sweep after burn-in over all
// chains; seconds are the fit's wall time including burn-in, so ESS per
// second is what a user gets for the whole run.
#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <cstdio>
#include <optional>
#include <sstream>
#include <string>
#include <vector>

#include <CLI/CLI.hpp>
#include <Eigen/Dense>

#include "model/data/holdout.hpp"
#include "model/data/ingest.hpp"
#include "model/fit/convergence_summary.hpp"
#include "model/fit/sampler.hpp"
#include "model/predict/mixture.hpp"

namespace {

using namespace credence;

struct Row {
    std::string label;
    double rhat, ess_bulk, ess_tail;
};

// The figures one variant is judged by: ESS per second of its slowest
// hyperparameter quantity and of its slowest prediction (ESS = min(bulk, tail)).
struct Headline {
    double slowest_hyper_ess_per_s = 0.0;
    std::string slowest_hyper;
    double slowest_prediction_ess_per_s = 0.0;
    double median_prediction_ess_per_s = 0.0;
};

Headline print_variant(const std::string& name, const FitOptions& o, const FitResult& fit, const ConvergenceSummary& c,
                       bool all_predictions) {
    Headline h;
    h.slowest_hyper_ess_per_s = INFINITY;
    const double sweeps = double(c.draws_per_chain) * o.chains;
    std::printf("\n== %s: %u chains x %u sweeps (assessed: the last %u), %.1f s, %.2f ms/sweep\n", name.c_str(), o.chains,
                fit.sweeps_per_chain, c.draws_per_chain, fit.seconds,
                1000.0 * fit.seconds / (double(fit.sweeps_per_chain) * o.chains));
    std::printf("%-34s %8s %10s %10s %12s %12s\n", "quantity", "R-hat", "bulk ESS", "tail ESS", "ESS/sweep",
                "ESS/s");
    std::vector<double> pred_ess;
    for (const auto& q : c.quantities) {
        const double ess = std::min(q.stats.ess_bulk, q.stats.ess_tail);
        if (q.quantity == "prediction") {
            pred_ess.push_back(ess);
            if (!all_predictions) continue;
        }
        std::printf("%-34s %8.3f %10.1f %10.1f %12.4f %12.2f\n", q.label().c_str(), q.stats.rhat, q.stats.ess_bulk,
                    q.stats.ess_tail, ess / sweeps, ess / fit.seconds);
        if (q.quantity != "prediction" && ess / fit.seconds < h.slowest_hyper_ess_per_s) {
            h.slowest_hyper_ess_per_s = ess / fit.seconds;
            h.slowest_hyper = q.label();
        }
    }
    if (!pred_ess.empty()) {
        std::sort(pred_ess.begin(), pred_ess.end());
        const double lo = pred_ess.front(), mid = pred_ess[pred_ess.size() / 2];
        std::printf("%-34s %8s %10s %10s %12.4f %12.2f\n", "predictions (min of 20)", "", "", "", lo / sweeps,
                    lo / fit.seconds);
        std::printf("%-34s %8s %10s %10s %12.4f %12.2f\n", "predictions (median of 20)", "", "", "", mid / sweeps,
                    mid / fit.seconds);
        h.slowest_prediction_ess_per_s = lo / fit.seconds;
        h.median_prediction_ess_per_s = mid / fit.seconds;
    }
    std::printf("verdict %s: max R-hat %.3f, min bulk ESS/chain %.1f, min tail ESS/chain %.1f\n", c.verdict.c_str(),
                c.max_rhat, c.min_ess_bulk_per_chain, c.min_ess_tail_per_chain);
    return h;
}

// The dense (user, item) index of the pair named by its external ids;
// exits with status 2 naming an id the data lack.
std::pair<uint32_t, uint32_t> pair_index(const Posterior& p, const std::string& user, const std::string& item) {
    auto find = [](const std::vector<std::string>& ids, const std::string& id, const char* what) {
        const auto at = std::find(ids.begin(), ids.end(), id);
        if (at == ids.end()) {
            std::fprintf(stderr, "mixing_bench: --trace-pair: no %s with id %s in the training data\n", what, id.c_str());
            std::exit(2);
        }
        return static_cast<uint32_t>(at - ids.begin());
    };
    return {find(p.user_ids, user, "customer"), find(p.item_ids, item, "product")};
}

// Per kept sample: chain, tau, bias precisions, traces of the factor
// covariances, mu_U . mu_V, mean biases, mean squared factor norms, the
// singular values of the factor product U V^T (sv*) and the eigenvalues of
// Lambda_U and Lambda_V in ascending order (lu*, lv*).
// With a pair (user, item index): that prediction and its parts (biases,
// factor dot product, factor norms) too.
void write_trace(const Posterior& p, const std::string& path, std::optional<std::pair<uint32_t, uint32_t>> pair) {
    std::FILE* f = std::fopen(path.c_str(), "w");
    std::fprintf(f, "chain\ttau\tlambda_b\tlambda_c\ttr_cov_u\ttr_cov_v\tmu_dot\tmean_b\tmean_c\tnorm_u\tnorm_v\tmu_u_norm\tmu_v_norm");
    if (pair) std::fprintf(f, "\tpred\tb_u\tc_i\tdot_ui\tnorm_uu\tnorm_vi");
    for (uint32_t k = 0; k < p.rank; ++k) std::fprintf(f, "\tsv%u", k);
    for (uint32_t k = 0; k < p.rank; ++k) std::fprintf(f, "\tlu%u", k);
    for (uint32_t k = 0; k < p.rank; ++k) std::fprintf(f, "\tlv%u", k);
    std::fprintf(f, "\n");
    const uint32_t K = p.rank;
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        auto mat = [&](const std::vector<float>& v) {
            Eigen::MatrixXd m(K, K);
            for (uint32_t a = 0; a < K; ++a)
                for (uint32_t b = 0; b < K; ++b) m(a, b) = v[(size_t(s) * K + a) * K + b];
            return m;
        };
        const double tu = mat(p.user_lambda).inverse().trace(), tv = mat(p.item_lambda).inverse().trace();
        double dot = 0, nu = 0, nv = 0, mb = 0, mc = 0, mun = 0, mvn = 0;
        for (uint32_t k = 0; k < K; ++k) {
            dot += double(p.user_mu[s * K + k]) * p.item_mu[s * K + k];
            mun += double(p.user_mu[s * K + k]) * p.user_mu[s * K + k];
            mvn += double(p.item_mu[s * K + k]) * p.item_mu[s * K + k];
        }
        for (uint32_t u = 0; u < p.num_users; ++u) {
            for (float x : p.user_factor(s, u)) nu += double(x) * x;
            mb += p.user_bias_of(s, u);
        }
        for (uint32_t i = 0; i < p.num_items; ++i) {
            for (float x : p.item_factor(s, i)) nv += double(x) * x;
            mc += p.item_bias_of(s, i);
        }
        std::fprintf(f, "%u\t%g\t%g\t%g\t%g\t%g\t%g\t%g\t%g\t%g\t%g\t%g\t%g", p.sample_chain[s], p.noise_precision[s],
                     p.has_biases ? p.user_bias_precision[s] : 0.f, p.has_biases ? p.item_bias_precision[s] : 0.f, tu, tv,
                     dot, mb / p.num_users, mc / p.num_items, nu / p.num_users, nv / p.num_items, std::sqrt(mun), std::sqrt(mvn));
        if (pair) {
            const auto [u, i] = *pair;
            double d = 0, a = 0, b = 0;
            const auto fu = p.user_factor(s, u), fi = p.item_factor(s, i);
            for (uint32_t k = 0; k < K; ++k) {
                d += double(fu[k]) * fi[k];
                a += double(fu[k]) * fu[k];
                b += double(fi[k]) * fi[k];
            }
            std::fprintf(f, "\t%g\t%g\t%g\t%g\t%g\t%g", p.sample_prediction(s, u, i), p.has_biases ? p.user_bias_of(s, u) : 0.f,
                         p.has_biases ? p.item_bias_of(s, i) : 0.f, d, std::sqrt(a), std::sqrt(b));
        }
        using RM = Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
        const Eigen::MatrixXd U = Eigen::Map<const RM>(p.user_factors.data() + size_t(s) * p.num_users * K, p.num_users, K).cast<double>();
        const Eigen::MatrixXd V = Eigen::Map<const RM>(p.item_factors.data() + size_t(s) * p.num_items * K, p.num_items, K).cast<double>();
        Eigen::HouseholderQR<Eigen::MatrixXd> qu(U), qv(V);
        const Eigen::MatrixXd ru = qu.matrixQR().topRows(K).triangularView<Eigen::Upper>();
        const Eigen::MatrixXd rv = qv.matrixQR().topRows(K).triangularView<Eigen::Upper>();
        Eigen::JacobiSVD<Eigen::MatrixXd> svd(ru * rv.transpose());
        for (uint32_t k = 0; k < K; ++k) std::fprintf(f, "\t%g", svd.singularValues()[k]);
        Eigen::SelfAdjointEigenSolver<Eigen::MatrixXd> eu(mat(p.user_lambda)), ev(mat(p.item_lambda));
        for (uint32_t k = 0; k < K; ++k) std::fprintf(f, "\t%g", eu.eigenvalues()[k]);
        for (uint32_t k = 0; k < K; ++k) std::fprintf(f, "\t%g", ev.eigenvalues()[k]);
        std::fprintf(f, "\n");
    }
    std::fclose(f);
}

// The ratings (scale "MIN:MAX" declared when given) and, with holdout > 0,
// a seeded split into training set and held-out ratings.
std::pair<RatingSet, std::vector<Rating>> load_split(const std::string& ratings, const std::string& scale,
                                                     double holdout, uint64_t split_seed) {
    IngestOptions in;
    in.path = ratings;
    in.rejects_path = "";  // the default place, written only when a row is rejected
    if (!scale.empty()) {
        const auto colon = scale.find(':');
        in.scale = RatingScale{std::stof(scale.substr(0, colon)), std::stof(scale.substr(colon + 1)), true};
    }
    auto data = ingest_ratings(in);
    if (holdout <= 0.0) return {std::move(data.ratings), {}};
    HoldoutSplit split = split_holdout(std::move(data.ratings), holdout, split_seed);
    return {std::move(split.train), std::move(split.test)};
}

// Held-out RMSE of the posterior mean (clipped to the scale), 90% coverage
// and mean log density of the posterior predictive mixture.
void print_held_out(const FitResult& fit, const std::vector<Rating>& test) {
    const Posterior& p = fit.posterior;
    double se = 0.0, inside = 0.0, lpd = 0.0;
    std::vector<double> m(p.num_samples);
    for (const Rating& r : test) {
        double mean = 0.0;
        for (uint32_t smp = 0; smp < p.num_samples; ++smp) {
            m[smp] = p.sample_prediction(smp, r.user, r.item);
            mean += m[smp];
        }
        mean = std::clamp(mean / p.num_samples, double(p.scale.min), double(p.scale.max));
        se += (r.value - mean) * (r.value - mean);
        inside += r.value >= mixture_quantile(m, p.noise_precision, 0.05) &&
                  r.value <= mixture_quantile(m, p.noise_precision, 0.95);
        lpd += mixture_log_density(m, p.noise_precision, r.value);
    }
    std::printf("held-out RMSE %.4f, 90%% coverage %.3f, mean log density %.4f on %zu ratings; %u sweeps per chain (%s)\n",
                std::sqrt(se / double(test.size())), inside / double(test.size()), lpd / double(test.size()),
                test.size(), fit.sweeps_per_chain, stop_reason_name(fit.stop_reason));
}

// Each later variant against the first: the slowest hyperparameter
// quantity's and the predictions' ESS per second.
void print_ratios(const std::vector<std::pair<std::string, Headline>>& headlines) {
    for (size_t later = 1; later < headlines.size(); ++later) {
        const Headline &before = headlines[0].second, &after = headlines[later].second;
        std::printf("\nslowest hyperparameter quantity, ESS/s: %s %.2f (%s) -> %s %.2f (%s): %.1fx\n",
                    headlines[0].first.c_str(), before.slowest_hyper_ess_per_s, before.slowest_hyper.c_str(),
                    headlines[later].first.c_str(), after.slowest_hyper_ess_per_s, after.slowest_hyper.c_str(),
                    after.slowest_hyper_ess_per_s / before.slowest_hyper_ess_per_s);
        std::printf("predictions, ESS/s: slowest %.2f -> %.2f (%.1fx), median %.2f -> %.2f (%.1fx)\n",
                    before.slowest_prediction_ess_per_s, after.slowest_prediction_ess_per_s,
                    after.slowest_prediction_ess_per_s / before.slowest_prediction_ess_per_s,
                    before.median_prediction_ess_per_s, after.median_prediction_ess_per_s,
                    after.median_prediction_ess_per_s / before.median_prediction_ess_per_s);
    }
}

}  // namespace

int main(int argc, char** argv) {
    CLI::App app{"mixing_bench: ESS per sweep and per second of the monitored quantities"};
    std::string ratings, scale, moves = "off,moves,on";
    double holdout = 0.0;
    FitOptions o;
    o.run_length = RunLength::fixed;
    o.samples = 400;
    o.thin = 1;
    app.add_option("--ratings", ratings)->required();
    app.add_option("--scale", scale);
    app.add_option("--holdout", holdout);
    app.add_option("--rank", o.rank);
    app.add_option("--chains", o.chains);
    app.add_option("--burn-in", o.burn_in);
    app.add_option("--samples", o.samples);
    app.add_option("--thin", o.thin);
    app.add_option("--seed", o.seed);
    app.add_option("--threads", o.threads);
    double fixed_noise = 0.0;
    app.add_option("--overrelaxation", o.overrelaxation,
                   "coefficient of the overrelaxed row draws in the variant \"on\" (FitOptions::overrelaxation)");
    app.add_option("--fixed-noise-precision", fixed_noise);
    app.add_option("--prior-nu0-minus-rank", o.prior.nu0_minus_rank,
                   "Wishart degrees of freedom of the factor prior, nu0 = K + this (HyperpriorOptions)");
    app.add_option("--prior-w0-scale", o.prior.w0_scale, "Wishart scale of the factor prior, W0 = this x I");
    std::string trace_path;
    bool all_predictions = false, converged = false;
    uint64_t split_seed = 0;
    app.add_flag("--converged", converged, "run each variant until converged (the fit's default) instead of a fixed length");
    app.add_option("--split-seed", split_seed, "seed of the held-out split (default: --seed)");
    app.add_flag("--all-predictions", all_predictions, "one line per probe prediction, not only min and median");
    app.add_option("--trace", trace_path, "write per-sample scalars (TSV) of the last variant here");
    std::vector<std::string> trace_pair;
    app.add_option("--trace-pair", trace_pair,
                   "customer and product id (as in the ratings and the prediction(...) labels) whose prediction and its parts the trace adds")
        ->expected(2)->delimiter(',');
    app.add_option("--moves", moves,
                   "comma list of variants: off (plain Gibbs), moves (with group moves), on (as shipped: group moves "
                   "and overrelaxed row draws)");
    CLI11_PARSE(app, argc, argv);

    if (converged) o.run_length = RunLength::converged;
    if (fixed_noise > 0.0) {
        o.sample_noise = false;
        o.fixed_noise_precision = fixed_noise;
    }
    auto [train, test] = load_split(ratings, scale, holdout, split_seed ? split_seed : o.seed);
    std::printf("data: %zu ratings, %zu users, %zu items; rank %u\n", train.ratings.size(), train.users.size(),
                train.items.size(), o.rank);

    std::stringstream list(moves);
    std::vector<std::pair<std::string, Headline>> headlines;
    for (std::string variant; std::getline(list, variant, ',');) {
        FitOptions v = o;
        if (variant != "off" && variant != "moves" && variant != "on") {
            std::fprintf(stderr, "mixing_bench: --moves: unknown variant '%s' (off, moves, on)\n", variant.c_str());
            return 2;
        }
        v.group_moves = variant != "off";
        if (variant != "on") v.overrelaxation = 0.0;
        const FitResult fit = fit_bpmf(train, v);
        headlines.emplace_back(variant, print_variant(variant, v, fit, fit.convergence, all_predictions));
        if (!test.empty()) print_held_out(fit, test);
        if (!trace_path.empty())
            write_trace(fit.posterior, trace_path,
                        trace_pair.size() == 2 ? std::optional(pair_index(fit.posterior, trace_pair[0], trace_pair[1]))
                                               : std::nullopt);
        std::fflush(stdout);
    }
    print_ratios(headlines);
    return 0;
}
