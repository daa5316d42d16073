#include "model/fit/warm_start.hpp"

#include <algorithm>
#include <cmath>
#include <map>

#include <fmt/format.h>

#include "model/error.hpp"
#include "model/math/distributions.hpp"
#include "model/math/random.hpp"

namespace credence {

namespace {

constexpr uint64_t kItemRowOffset = uint64_t(1) << 40;  // as initial_state keys item rows

// The old fit's options as it stored them (fit metadata "options"); an empty
// object for a file that recorded none.
nlohmann::json old_options(const Posterior& old) {
    const auto meta = nlohmann::json::parse(old.fit_metadata_json, nullptr, false);
    if (meta.is_discarded() || !meta.is_object() || !meta.contains("options") || !meta["options"].is_object())
        return nlohmann::json::object();
    return meta["options"];
}

std::string old_verdict(const Posterior& old) {
    const auto diag = nlohmann::json::parse(old.diagnostics_json, nullptr, false);
    if (diag.is_discarded() || !diag.is_object() || !diag.contains("verdict") || !diag["verdict"].is_string())
        return "unknown";
    return diag["verdict"].get<std::string>();
}

// A stored option that differs from this fit's: the old draws are of another model.
void require_same(const nlohmann::json& stored, const char* key, const nlohmann::json& now, const std::string& what,
                  const std::string& old_name) {
    if (!stored.contains(key) || stored[key] == now) return;
    throw OptionError(fmt::format("--warm-start {}: the old model has {} {}, this fit {}; a warm start needs the same "
                                  "model: fit with the old setting or without --warm-start",
                                  old_name, what, stored[key].dump(), now.dump()));
}

// Refuses the cases the header lists, before any state is built.
void check_compatible(const Posterior& old, const std::string& old_name, const RatingSet& train,
                      const FitOptions& o) {
    if (old.rank != o.rank)
        throw OptionError(fmt::format("--warm-start {}: the old model has rank {}, this fit --rank {}; a warm start "
                                      "needs the same rank: pass --rank {} or fit without --warm-start",
                                      old_name, old.rank, o.rank, old.rank));
    if (old.has_biases != o.biases)
        throw OptionError(fmt::format("--warm-start {}: the old model was fitted {} biases, this fit {} them; pass "
                                      "the same bias setting or fit without --warm-start",
                                      old_name, old.has_biases ? "with" : "without", o.biases ? "with" : "without"));
    const nlohmann::json stored = old_options(old);
    require_same(stored, "sample_noise", o.sample_noise, "a sampled noise precision setting", old_name);
    if (!o.sample_noise)
        require_same(stored, "fixed_noise_precision", o.fixed_noise_precision, "--fixed-noise-precision", old_name);
    if (stored.contains("prior") && stored["prior"].is_object()) {
        const auto& p = stored["prior"];
        require_same(p, "beta0", o.prior.beta0, "--prior-beta0", old_name);
        require_same(p, "nu0_minus_rank", o.prior.nu0_minus_rank, "--prior-nu0-minus-rank", old_name);
        require_same(p, "w0_scale", o.prior.w0_scale, "--prior-w0-scale", old_name);
        require_same(p, "noise_shape", o.prior.noise_shape, "--noise-prior-shape", old_name);
        require_same(p, "noise_rate", o.prior.noise_rate, "--noise-prior-rate", old_name);
        require_same(p, "bias_shape", o.prior.bias_shape, "--bias-prior-shape", old_name);
        require_same(p, "bias_rate", o.prior.bias_rate, "--bias-prior-rate", old_name);
    }
    if (old.scale.min != train.scale.min || old.scale.max != train.scale.max)
        throw DataError(fmt::format("--warm-start {}: the old model's ratings run from {:g} to {:g}, these from {:g} "
                                    "to {:g}; factors fitted on another scale are not a safe start: declare the same "
                                    "--scale for both fits, or fit without --warm-start",
                                    old_name, old.scale.min, old.scale.max, train.scale.min, train.scale.max));
}

struct IdMapping {
    std::vector<int64_t> user_old, item_old;  // new index -> old index, -1 when new
    uint64_t known_ratings = 0;               // training ratings whose customer and product the old model has
};

IdMapping map_ids(const Posterior& old, const RatingSet& train) {
    const IdMap old_users = IdMap::from_names(old.user_ids), old_items = IdMap::from_names(old.item_ids);
    IdMapping m;
    m.user_old.resize(train.users.size());
    m.item_old.resize(train.items.size());
    for (uint32_t u = 0; u < train.users.size(); ++u) {
        const auto found = old_users.find(train.users.name(u));
        m.user_old[u] = found ? int64_t(*found) : -1;
    }
    for (uint32_t i = 0; i < train.items.size(); ++i) {
        const auto found = old_items.find(train.items.name(i));
        m.item_old[i] = found ? int64_t(*found) : -1;
    }
    for (const Rating& r : train.ratings) m.known_ratings += m.user_old[r.user] >= 0 && m.item_old[r.item] >= 0;
    return m;
}

// The kept sample chain `c` of the new fit starts from (see the header).
uint32_t start_sample(const Posterior& old, uint32_t c) {
    std::map<uint32_t, std::vector<uint32_t>> by_chain;
    for (uint32_t s = 0; s < old.num_samples; ++s) by_chain[old.sample_chain[s]].push_back(s);
    std::vector<const std::vector<uint32_t>*> chains;
    for (const auto& [chain, samples] : by_chain) chains.push_back(&samples);
    const auto& samples = *chains[c % chains.size()];
    const size_t back = std::min<size_t>(c / chains.size(), samples.size() - 1);
    return samples[samples.size() - 1 - back];
}

Eigen::VectorXd mu_of(const std::vector<float>& mu, uint32_t s, uint32_t k) {
    Eigen::VectorXd out(k);
    for (uint32_t a = 0; a < k; ++a) out[a] = mu[size_t(s) * k + a];
    return out;
}

Eigen::MatrixXd lambda_of(const std::vector<float>& lambda, uint32_t s, uint32_t k) {
    Eigen::MatrixXd out(k, k);
    for (uint32_t a = 0; a < k; ++a)
        for (uint32_t b = 0; b < k; ++b) out(a, b) = lambda[(size_t(s) * k + a) * k + b];
    return 0.5 * (out + out.transpose());  // float32 storage may lose exact symmetry
}

// One side's rows: copied from old sample s where the id is known, else
// drawn from the prior given the sample's hyperparameters.
void fill_side(const std::vector<int64_t>& old_index, uint32_t old_rows, const std::vector<float>& old_factors,
               const std::vector<float>& old_bias, const Eigen::VectorXd& mu, const Eigen::MatrixXd& lambda,
               double bias_precision, uint32_t s, uint32_t k, bool biases, float bias_shift, uint64_t row_offset,
               uint64_t seed, uint32_t chain, FactorRows& factors, std::vector<float>& bias) {
    factors.assign(old_index.size() * k, 0.0f);
    if (biases) bias.assign(old_index.size(), 0.0f);
    for (size_t r = 0; r < old_index.size(); ++r) {
        float* out = factors.data() + r * k;
        if (old_index[r] >= 0) {
            const float* from = old_factors.data() + (size_t(s) * old_rows + size_t(old_index[r])) * k;
            std::copy(from, from + k, out);
            if (biases) bias[r] = old_bias[size_t(s) * old_rows + size_t(old_index[r])] + bias_shift;
            continue;
        }
        Rng rng = Rng::keyed(seed, chain, 0, StreamBlock::init, row_offset + r);
        const Eigen::VectorXd x = draw_normal_from_precision(rng, mu, lambda);
        for (uint32_t a = 0; a < k; ++a) out[a] = static_cast<float>(x[a]);
        if (biases) bias[r] = static_cast<float>(rng.normal() / std::sqrt(bias_precision)) + bias_shift;
    }
}

GibbsState state_from(const Posterior& old, uint32_t s, const IdMapping& ids, const RatingSet& train,
                      const FitOptions& o, uint32_t chain) {
    const uint32_t k = old.rank;
    GibbsState st;
    st.rank = k;
    st.biases = o.biases;
    st.user_mu = mu_of(old.user_mu, s, k);
    st.item_mu = mu_of(old.item_mu, s, k);
    st.user_lambda = lambda_of(old.user_lambda, s, k);
    st.item_lambda = lambda_of(old.item_lambda, s, k);
    st.user_bias_precision = o.biases ? double(old.user_bias_precision[s]) : 1.0;
    st.item_bias_precision = o.biases ? double(old.item_bias_precision[s]) : 1.0;
    st.noise_precision = o.sample_noise ? double(old.noise_precision[s]) : o.fixed_noise_precision;
    // Predictions are g + b_u + c_i + u.v: moving g_old - g_new into every
    // item bias keeps each old prediction where it was.
    const float shift = o.biases ? static_cast<float>(double(old.global_mean) - train.mean()) : 0.0f;
    fill_side(ids.user_old, old.num_users, old.user_factors, old.user_bias, st.user_mu, st.user_lambda,
              st.user_bias_precision, s, k, o.biases, 0.0f, 0, o.seed, chain, st.user_factors, st.user_bias);
    fill_side(ids.item_old, old.num_items, old.item_factors, old.item_bias, st.item_mu, st.item_lambda,
              st.item_bias_precision, s, k, o.biases, shift, kItemRowOffset, o.seed, chain, st.item_factors,
              st.item_bias);
    return st;
}

}  // namespace

WarmStart warm_start_from(const Posterior& old, const std::string& old_name, const RatingSet& train,
                          const FitOptions& options) {
    check_compatible(old, old_name, train, options);
    const IdMapping ids = map_ids(old, train);
    const double known_share = train.ratings.empty() ? 0.0 : double(ids.known_ratings) / double(train.size());
    if (known_share < 0.5)
        throw DataError(fmt::format("--warm-start {}: the old model knows the customer and the product of only "
                                    "{:.0f}% of these {} ratings; a start made mostly of prior draws saves nothing: "
                                    "fit without --warm-start",
                                    old_name, 100.0 * known_share, train.size()));
    WarmStart w;
    std::vector<uint32_t> from;
    for (uint32_t c = 0; c < options.chains; ++c) {
        from.push_back(start_sample(old, c));
        try {
            w.states.push_back(state_from(old, from.back(), ids, train, options, c));
        } catch (const NumericError& e) {
            throw NumericError(fmt::format("--warm-start {}: kept sample {} cannot start a chain ({}); fit without "
                                           "--warm-start",
                                           old_name, from.back(), e.what()));
        }
    }
    const std::string verdict = old_verdict(old);
    const bool converged = verdict == "converged";
    w.burn_in = converged ? kWarmStartBurnIn : UINT32_MAX;

    auto count_new = [](const std::vector<int64_t>& v) { return uint64_t(std::count(v.begin(), v.end(), int64_t(-1))); };
    const uint64_t new_users = count_new(ids.user_old), new_items = count_new(ids.item_old);
    w.record = {{"kind", "warm"},
                {"from", old_name},
                {"from_verdict", verdict},
                {"from_samples", from},
                {"customers_kept", train.users.size() - new_users},
                {"customers_new", new_users},
                {"customers_dropped", old.num_users - (train.users.size() - new_users)},
                {"products_kept", train.items.size() - new_items},
                {"products_new", new_items},
                {"products_dropped", old.num_items - (train.items.size() - new_items)},
                {"ratings_on_known_ids", ids.known_ratings},
                {"burn_in_rule", converged ? fmt::format("min(n/4, {}) sweeps: the start is a converged draw",
                                                         kWarmStartBurnIn)
                                           : std::string("n/4 sweeps: the old fit had not converged")}};
    return w;
}

}  // namespace credence
