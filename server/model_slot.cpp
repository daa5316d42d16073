#include "server/model_slot.hpp"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <numeric>

#include <Eigen/Dense>
#include <xxhash.h>

#include "model/error.hpp"
#include "model/posterior/posterior_file.hpp"

namespace credence::server {

namespace {

using MatrixXdR = Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

template <typename T>
void hash_vector(XXH3_state_t* state, const std::vector<T>& v) {
    const uint64_t n = v.size();
    XXH3_64bits_update(state, &n, sizeof n);
    if (!v.empty()) XXH3_64bits_update(state, v.data(), v.size() * sizeof(T));
}

void hash_string(XXH3_state_t* state, const std::string& s) {
    const uint64_t n = s.size();
    XXH3_64bits_update(state, &n, sizeof n);
    XXH3_64bits_update(state, s.data(), s.size());
}

// Lambda^-1 for each sample's K x K precision matrix.
std::vector<double> invert_precisions(const std::vector<float>& lambda, uint32_t S, uint32_t K, const char* who) {
    std::vector<double> cov(static_cast<size_t>(S) * K * K);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::Map<const Eigen::Matrix<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>> L(
            lambda.data() + static_cast<size_t>(s) * K * K, K, K);
        Eigen::LLT<Eigen::MatrixXd> llt(L.cast<double>());
        if (llt.info() != Eigen::Success)
            throw Error(std::string("model: the ") + who + " hyperparameter precision of sample " +
                        std::to_string(s) + " is not positive definite; refit or check the file");
        Eigen::MatrixXd inv = llt.solve(Eigen::MatrixXd::Identity(K, K));
        Eigen::Map<MatrixXdR>(cov.data() + static_cast<size_t>(s) * K * K, K, K) = inv;
    }
    return cov;
}

std::vector<uint32_t> order_desc(const std::vector<double>& key) {
    std::vector<uint32_t> order(key.size());
    std::iota(order.begin(), order.end(), 0u);
    // Ties break by item index so lists are stable across loads.
    std::stable_sort(order.begin(), order.end(), [&](uint32_t a, uint32_t b) { return key[a] > key[b]; });
    return order;
}

// Mean and sd of m_s(u,i) = g + b_u + b_i + u.v over users and samples, for
// every item, without touching U x I pairs: with x_u = [u, b_u, 1] and
// y_i = [v_i, 1, g + b_i], m = x_u.y_i, so the mean over users is xbar_s.y_i
// and the second moment is y_i' M_s y_i with M_s the users' second-moment
// matrix of x. With no users, the user hyperparameter prior stands in.
void population_stats(const Posterior& p, const std::vector<double>& user_cov, LoadedModel& m) {
    const uint32_t S = p.num_samples, I = p.num_items, U = p.num_users, K = p.rank;
    const int D = static_cast<int>(K) + 2;
    std::vector<double> sum(I, 0.0), sum_sq(I, 0.0);
    MatrixXdR Y(I, D);
    for (uint32_t s = 0; s < S; ++s) {
        Eigen::MatrixXd M = Eigen::MatrixXd::Zero(D, D);
        Eigen::VectorXd xbar = Eigen::VectorXd::Zero(D);
        if (U > 0) {
            MatrixXdR X(U, D);
            for (uint32_t u = 0; u < U; ++u) {
                const auto f = p.user_factor(s, u);
                for (uint32_t k = 0; k < K; ++k) X(u, k) = f[k];
                X(u, K) = p.user_bias_of(s, u);
                X(u, K + 1) = 1.0;
            }
            M.selfadjointView<Eigen::Lower>().rankUpdate(X.transpose(), 1.0 / U);
            M = M.selfadjointView<Eigen::Lower>();
            xbar = X.colwise().mean().transpose();
        } else {
            Eigen::Map<const Eigen::VectorXf> mu(p.user_mu.data() + static_cast<size_t>(s) * K, K);
            Eigen::Map<const MatrixXdR> cov(user_cov.data() + static_cast<size_t>(s) * K * K, K, K);
            xbar.head(K) = mu.cast<double>();
            xbar(K + 1) = 1.0;
            M.topLeftCorner(K, K) = cov + xbar.head(K) * xbar.head(K).transpose();
            M.block(0, K + 1, K, 1) = xbar.head(K);
            M.block(K + 1, 0, 1, K) = xbar.head(K).transpose();
            M(K, K) = p.has_biases ? 1.0 / p.user_bias_precision[s] : 0.0;
            M(K + 1, K + 1) = 1.0;
        }
        for (uint32_t i = 0; i < I; ++i) {
            const auto v = p.item_factor(s, i);
            for (uint32_t k = 0; k < K; ++k) Y(i, k) = v[k];
            Y(i, K) = 1.0;
            Y(i, K + 1) = static_cast<double>(p.global_mean) + p.item_bias_of(s, i);
        }
        const Eigen::VectorXd mean_s = Y * xbar;
        const Eigen::VectorXd second_s = ((Y * M).cwiseProduct(Y)).rowwise().sum();
        for (uint32_t i = 0; i < I; ++i) {
            sum[i] += mean_s(i);
            sum_sq[i] += second_s(i);
        }
    }
    m.population_mean.resize(I);
    m.population_sd.resize(I);
    for (uint32_t i = 0; i < I; ++i) {
        const double mean = sum[i] / S;
        // Rounding can push a zero variance a hair below zero.
        m.population_mean[i] = mean;
        m.population_sd[i] = std::sqrt(std::max(0.0, sum_sq[i] / S - mean * mean));
    }
}

void factor_stats(const Posterior& p, LoadedModel& m) {
    const uint32_t S = p.num_samples, I = p.num_items, K = p.rank;
    std::vector<double> sum(static_cast<size_t>(I) * K, 0.0), sum_sq(static_cast<size_t>(I) * K, 0.0);
    m.item_norm.resize(static_cast<size_t>(S) * I);
    for (uint32_t s = 0; s < S; ++s) {
        const float* block = p.item_block(s);
        for (uint32_t i = 0; i < I; ++i) {
            double norm_sq = 0.0;
            for (uint32_t k = 0; k < K; ++k) {
                const double x = block[static_cast<size_t>(i) * K + k];
                sum[static_cast<size_t>(i) * K + k] += x;
                sum_sq[static_cast<size_t>(i) * K + k] += x * x;
                norm_sq += x * x;
            }
            m.item_norm[static_cast<size_t>(s) * I + i] = static_cast<float>(std::sqrt(norm_sq));
        }
    }
    m.factor_mean.resize(static_cast<size_t>(I) * K);
    m.factor_sd.resize(static_cast<size_t>(I) * K);
    m.factor_spread.resize(I);
    for (uint32_t i = 0; i < I; ++i) {
        double spread_sq = 0.0;
        for (uint32_t k = 0; k < K; ++k) {
            const size_t j = static_cast<size_t>(i) * K + k;
            const double mean = sum[j] / S;
            const double var = std::max(0.0, sum_sq[j] / S - mean * mean);
            m.factor_mean[j] = static_cast<float>(mean);
            m.factor_sd[j] = static_cast<float>(std::sqrt(var));
            spread_sq += var;
        }
        m.factor_spread[i] = std::sqrt(spread_sq / K);
    }
}

}  // namespace

std::string posterior_fingerprint(const Posterior& p) {
    XXH3_state_t* state = XXH3_createState();
    XXH3_64bits_reset(state);
    const uint32_t shape[6] = {p.rank, p.num_users, p.num_items, p.num_samples, p.num_chains, p.has_biases ? 1u : 0u};
    XXH3_64bits_update(state, shape, sizeof shape);
    for (const auto& id : p.user_ids) hash_string(state, id);
    for (const auto& id : p.item_ids) hash_string(state, id);
    const float scalars[3] = {p.global_mean, p.scale.min, p.scale.max};
    XXH3_64bits_update(state, scalars, sizeof scalars);
    hash_vector(state, p.sample_chain);
    hash_vector(state, p.user_factors);
    hash_vector(state, p.item_factors);
    hash_vector(state, p.user_bias);
    hash_vector(state, p.item_bias);
    hash_vector(state, p.noise_precision);
    hash_vector(state, p.user_mu);
    hash_vector(state, p.user_lambda);
    hash_vector(state, p.item_mu);
    hash_vector(state, p.item_lambda);
    hash_vector(state, p.user_bias_precision);
    hash_vector(state, p.item_bias_precision);
    hash_vector(state, p.rated_offsets);
    hash_vector(state, p.rated_items);
    hash_string(state, p.fit_metadata_json);
    hash_string(state, p.diagnostics_json);
    const uint64_t h = XXH3_64bits_digest(state);
    XXH3_freeState(state);
    char hex[17];
    std::snprintf(hex, sizeof hex, "%016llx", static_cast<unsigned long long>(h));
    return hex;
}

std::shared_ptr<const LoadedModel> build_loaded_model(std::shared_ptr<const Posterior> posterior,
                                                      std::string source_path) {
    const auto start = std::chrono::steady_clock::now();
    const Posterior& p = *posterior;
    auto m = std::make_shared<LoadedModel>(posterior);
    m->users = IdMap::from_names(p.user_ids);
    m->items = IdMap::from_names(p.item_ids);
    m->source_path = std::move(source_path);
    m->fingerprint = posterior_fingerprint(p);

    m->rating_count.assign(p.num_items, 0);
    for (uint32_t i : p.rated_items) ++m->rating_count[i];

    m->user_cov = invert_precisions(p.user_lambda, p.num_samples, p.rank, "user");
    m->item_cov = invert_precisions(p.item_lambda, p.num_samples, p.rank, "item");
    population_stats(p, m->user_cov, *m);
    factor_stats(p, *m);

    m->by_uncertainty = order_desc(m->factor_spread);
    std::vector<double> counts(m->rating_count.begin(), m->rating_count.end());
    m->by_popularity = order_desc(counts);
    m->by_mean = order_desc(m->population_mean);

    m->load_ms = std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
    m->loaded_at_unix_s = std::chrono::duration_cast<std::chrono::seconds>(
                              std::chrono::system_clock::now().time_since_epoch())
                              .count();
    return m;
}

std::shared_ptr<const LoadedModel> load_model_file(const std::string& path) {
    const auto start = std::chrono::steady_clock::now();
    auto posterior = std::make_shared<const Posterior>(read_posterior(path));
    auto model = build_loaded_model(std::move(posterior), path);
    auto m = std::const_pointer_cast<LoadedModel>(model);
    m->load_ms = std::chrono::duration<double, std::milli>(std::chrono::steady_clock::now() - start).count();
    return model;
}

}  // namespace credence::server
