// Tests for model/predict/item_statistics: every statistic against a plain
// loop over users and samples in double, the orderings against their keys,
// the covariances against their precisions, and the similar-items ranking
// against a direct per-sample cosine.
#include <catch2/catch.hpp>

#include <algorithm>
#include <cmath>
#include <numeric>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

#include <Eigen/Dense>

#include "model/error.hpp"
#include "model/predict/item_statistics.hpp"
#include "tests/support/simulate.hpp"

using namespace credence;

namespace {

// m_s(u, i) written out from the arrays.
double sample_mean(const Posterior& p, uint32_t s, uint32_t u, uint32_t i) {
    double m = double(p.global_mean) + p.user_bias_of(s, u) + p.item_bias_of(s, i);
    for (uint32_t k = 0; k < p.rank; ++k) m += double(p.user_factor(s, u)[k]) * p.item_factor(s, i)[k];
    return m;
}

// Sample s's precision matrix as an Eigen matrix in double.
Eigen::MatrixXd precision_of(const std::vector<float>& lambda, uint32_t s, uint32_t K) {
    Eigen::MatrixXd L(K, K);
    for (uint32_t a = 0; a < K; ++a)
        for (uint32_t b = 0; b < K; ++b) L(a, b) = lambda[(size_t(s) * K + a) * K + b];
    return L;
}

// Checks `order` is a permutation of 0..I-1 sorted by key, largest first, ties by index.
template <class Key>
void check_order(const std::vector<uint32_t>& order, uint32_t I, Key key) {
    REQUIRE(order.size() == I);
    std::vector<uint32_t> sorted = order;
    std::sort(sorted.begin(), sorted.end());
    std::vector<uint32_t> all(I);
    std::iota(all.begin(), all.end(), 0u);
    CHECK(sorted == all);
    for (size_t k = 1; k < order.size(); ++k) {
        INFO("position " << k);
        CHECK(key(order[k - 1]) >= key(order[k]));
        if (key(order[k - 1]) == key(order[k])) CHECK(order[k - 1] < order[k]);
    }
}

// Cosine of V_a,s and V_b,s in double; 0 when either is the zero vector.
double cosine(const Posterior& p, uint32_t s, uint32_t a, uint32_t b) {
    double dot = 0, na = 0, nb = 0;
    for (uint32_t k = 0; k < p.rank; ++k) {
        const double x = p.item_factor(s, a)[k], y = p.item_factor(s, b)[k];
        dot += x * y;
        na += x * x;
        nb += y * y;
    }
    return na > 0 && nb > 0 ? dot / std::sqrt(na * nb) : 0.0;
}

}  // namespace

TEST_CASE("item statistics equal a direct loop over users and samples") {
    const Posterior p =
        simulate_posterior({.users = 30, .items = 45, .rank = 3, .samples = 12, .chains = 2, .duplicate_items = 4});
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t S = p.num_samples, U = p.num_users, I = p.num_items, K = p.rank;
    REQUIRE(st.num_items == I);
    REQUIRE(st.rank == K);
    REQUIRE(st.num_samples == S);
    for (uint32_t i = 0; i < I; ++i) {
        INFO("item " << i);
        uint32_t count = 0;
        for (uint32_t u = 0; u < U; ++u)
            for (uint32_t j : p.rated_by(u)) count += j == i;
        CHECK(st.rating_count[i] == count);

        double sum = 0, sum_sq = 0;
        for (uint32_t s = 0; s < S; ++s)
            for (uint32_t u = 0; u < U; ++u) {
                const double m = sample_mean(p, s, u, i);
                sum += m;
                sum_sq += m * m;
            }
        const double n = double(S) * U, mean = sum / n;
        // Two summation orders of ~400 double terms: agreement to 1e-9
        // relative (the sd, a difference of near-equal moments, to 1e-7).
        CHECK(st.population_mean[i] == Approx(mean).epsilon(1e-9));
        CHECK(st.population_sd[i] == Approx(std::sqrt(sum_sq / n - mean * mean)).epsilon(1e-7));

        double spread_sq = 0;
        for (uint32_t k = 0; k < K; ++k) {
            double s1 = 0, s2 = 0;
            for (uint32_t s = 0; s < S; ++s) {
                const double x = p.item_factor(s, i)[k];
                s1 += x;
                s2 += x * x;
            }
            const double fm = s1 / S, fv = s2 / S - fm * fm;
            // Stored as float: agreement to float rounding (the sd to 1e-4,
            // again a difference of moments).
            CHECK(st.factor_mean[size_t(i) * K + k] == Approx(fm).epsilon(1e-6).margin(1e-7));
            CHECK(st.factor_sd[size_t(i) * K + k] == Approx(std::sqrt(fv)).epsilon(1e-4));
            spread_sq += fv;
        }
        CHECK(st.factor_spread[i] == Approx(std::sqrt(spread_sq / K)).epsilon(1e-6));
        for (uint32_t s = 0; s < S; ++s) {
            double norm_sq = 0;
            for (uint32_t k = 0; k < K; ++k) norm_sq += double(p.item_factor(s, i)[k]) * p.item_factor(s, i)[k];
            CHECK(st.item_norm[size_t(s) * I + i] == Approx(std::sqrt(norm_sq)).epsilon(1e-6));
        }
    }
    // The duplicated items (the last 4 copy items 0..3) tie on the factor
    // statistics, so the orderings' tie rule is exercised.
    check_order(st.by_uncertainty, I, [&](uint32_t i) { return st.predictive_sd[i]; });
    check_order(st.by_popularity, I, [&](uint32_t i) { return double(st.rating_count[i]); });
    check_order(st.by_mean, I, [&](uint32_t i) { return st.predictive_mean[i]; });
    CHECK(st.predictive_sd[0] == st.predictive_sd[I - 4]);
    CHECK(st.factor_spread[0] == st.factor_spread[I - 4]);
}

TEST_CASE("hyperparameter covariances invert each sample's precision") {
    const Posterior p = simulate_posterior({.users = 5, .items = 6, .rank = 4, .samples = 5, .chains = 1, .seed = 3});
    const HyperparameterCovariances cov = hyperparameter_covariances(p);
    const uint32_t K = p.rank;
    REQUIRE(cov.user.size() == size_t(p.num_samples) * K * K);
    REQUIRE(cov.item.size() == size_t(p.num_samples) * K * K);
    for (uint32_t s = 0; s < p.num_samples; ++s) {
        const Eigen::Map<const Eigen::Matrix<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>> cu(
            cov.user_of(s), K, K), ci(cov.item_of(s), K, K);
        // Lambda * Sigma = I up to double rounding of a well-conditioned 4 x 4 solve.
        CHECK((precision_of(p.user_lambda, s, K) * cu - Eigen::MatrixXd::Identity(K, K)).cwiseAbs().maxCoeff() < 1e-12);
        CHECK((precision_of(p.item_lambda, s, K) * ci - Eigen::MatrixXd::Identity(K, K)).cwiseAbs().maxCoeff() < 1e-12);
    }
    // ItemStatistics carries the same matrices.
    CHECK(compute_item_statistics(p).covariances.user == cov.user);
}

// With no known users the population moments are exact expectations under
// each sample's user prior: E[m] = g + c_i + mu_U.v_i and
// Var[m] = v_i' Sigma_U v_i + 1/lambda_b (a linear map of Gaussians; Bishop
// 2006, eq. 2.115); over samples, mean of E and of (Var + E^2).
TEST_CASE("with no known users the item moments come from the user prior") {
    const Posterior p = simulate_posterior({.users = 0, .items = 7, .rank = 2, .samples = 4, .chains = 1, .seed = 12});
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t S = p.num_samples, K = p.rank;
    for (uint32_t i = 0; i < p.num_items; ++i) {
        double first = 0, second = 0;
        for (uint32_t s = 0; s < S; ++s) {
            const Eigen::MatrixXd sigma = precision_of(p.user_lambda, s, K).inverse();
            Eigen::VectorXd v(K), mu(K);
            for (uint32_t k = 0; k < K; ++k) {
                v(k) = p.item_factor(s, i)[k];
                mu(k) = p.user_mu[s * K + k];
            }
            const double e = double(p.global_mean) + p.item_bias_of(s, i) + mu.dot(v);
            const double var = v.dot(sigma * v) + 1.0 / p.user_bias_precision[s];
            first += e / S;
            second += (var + e * e) / S;
        }
        INFO("item " << i);
        CHECK(st.population_mean[i] == Approx(first).epsilon(1e-9));
        CHECK(st.population_sd[i] == Approx(std::sqrt(second - first * first)).epsilon(1e-7));
        CHECK(st.rating_count[i] == 0);
    }
}

TEST_CASE("a precision that is not positive definite is refused with the sample named") {
    Posterior p = simulate_posterior({.users = 5, .items = 6, .rank = 2, .samples = 3, .chains = 1});
    p.item_lambda[1 * 4 + 0] = -1.0f;  // sample 1's first diagonal entry
    try {
        compute_item_statistics(p);
        FAIL("a broken item precision was accepted");
    } catch (const NumericError& e) {
        const std::string what = e.what();
        CHECK(what.find("item") != std::string::npos);
        CHECK(what.find("sample 1") != std::string::npos);
    }
}

TEST_CASE("similar items rank by the per-sample cosine averaged over samples") {
    Posterior p =
        simulate_posterior({.users = 8, .items = 40, .rank = 4, .samples = 10, .chains = 2, .seed = 17, .duplicate_items = 3});
    // Item 20 has a zero factor in sample 4: no direction, cosine 0 there.
    std::fill_n(p.item_factors.begin() + (size_t(4) * p.num_items + 20) * p.rank, p.rank, 0.0f);
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t S = p.num_samples, I = p.num_items;
    for (uint32_t target : {0u, 9u, 20u}) {
        INFO("target " << target);
        std::vector<std::pair<double, uint32_t>> want;  // (-similarity, item): sorts best first
        for (uint32_t i = 0; i < I; ++i) {
            if (i == target) continue;
            double total = 0;
            for (uint32_t s = 0; s < S; ++s) total += cosine(p, s, target, i);
            want.emplace_back(-total / S, i);
        }
        std::sort(want.begin(), want.end());
        const auto got = similar_items(p, st, target, 12);
        REQUIRE(got.size() == 12);
        for (size_t k = 0; k < got.size(); ++k) {
            INFO("rank " << k);
            CHECK(got[k].item != target);
            // float dot products and norms vs double here: 1e-5 absolute.
            CHECK(got[k].similarity == Approx(-want[k].first).margin(1e-5));
            if (k > 0) CHECK(got[k - 1].similarity >= got[k].similarity);
        }
        // Ids agree wherever the direct scores are not near-tied.
        for (size_t k = 0; k + 1 < got.size(); ++k)
            if (want[k + 1].first - want[k].first > 1e-4) CHECK(got[k].item == want[k].second);
    }
    // Item 0's exact copy (item 37) has cosine 1 in every sample.
    const auto twin = similar_items(p, st, 0, 1);
    REQUIRE(twin.size() == 1);
    CHECK(twin[0].item == I - 3);
    CHECK(twin[0].similarity == Approx(1.0).margin(1e-6));
    // Items 1 and 38 are copies: for a third item they tie, and the lower index comes first.
    const auto list = similar_items(p, st, 5, I);
    const auto at = [&](uint32_t item) {
        return std::find_if(list.begin(), list.end(), [&](const SimilarItem& s) { return s.item == item; }) - list.begin();
    };
    CHECK(list[at(1)].similarity == list[at(I - 2)].similarity);
    CHECK(at(1) < at(I - 2));
}

TEST_CASE("similar items honour n and refuse a bad target or foreign statistics") {
    const Posterior p = simulate_posterior({.users = 4, .items = 6, .rank = 2, .samples = 3, .chains = 1});
    const ItemStatistics st = compute_item_statistics(p);
    CHECK(similar_items(p, st, 2, 0).empty());
    CHECK(similar_items(p, st, 2, 100).size() == 5);
    CHECK_THROWS_AS(similar_items(p, st, 6, 3), std::out_of_range);
    const Posterior other = simulate_posterior({.users = 4, .items = 7, .rank = 2, .samples = 3, .chains = 1});
    CHECK_THROWS_AS(similar_items(other, st, 2, 3), std::invalid_argument);
}

TEST_CASE("the averaged predictive mean and sd equal each customer's predictive moments averaged directly") {
    // Direct computation: for every (customer u, item i), the mixture over
    // samples of Normal(m_s(u, i), 1/tau_s) has mean mean_s m_s and variance
    // mean_s(1/tau_s) + mean_s m_s^2 - (mean_s m_s)^2 (law of total variance,
    // common practice); the mean is clipped to the scale as answers are.
    for (bool biases : {true, false}) {
        INFO("biases " << biases);
        // 37 customers: two full blocks of 16 and a partial one.
        Posterior p = simulate_posterior(
            {.users = 37, .items = 23, .rank = 3, .samples = 9, .chains = 1, .biases = biases, .seed = 12});
        p.scale.max = p.global_mean + 0.4f;  // so the clipping of the mean is exercised
        const ItemStatistics st = compute_item_statistics(p);
        const uint32_t S = p.num_samples, U = p.num_users, I = p.num_items;
        size_t clipped_pairs = 0;
        for (uint32_t i = 0; i < I; ++i) {
            double mean_sum = 0.0, sd_sum = 0.0;
            for (uint32_t u = 0; u < U; ++u) {
                double m1 = 0.0, m2 = 0.0, noise = 0.0;
                for (uint32_t s = 0; s < S; ++s) {
                    const double m = sample_mean(p, s, u, i);
                    m1 += m / S;
                    m2 += m * m / S;
                    noise += 1.0 / p.noise_precision[s] / S;
                }
                clipped_pairs += m1 > p.scale.max;
                mean_sum += std::clamp(m1, double(p.scale.min), double(p.scale.max));
                sd_sum += std::sqrt(noise + m2 - m1 * m1);
            }
            INFO("item " << i);
            // The library forms m_s from float dot products (rounding about
            // 1e-7 of |u.v|), the loop in double: agreement to 1e-5 relative.
            CHECK(st.predictive_mean[i] == Approx(mean_sum / U).epsilon(1e-5));
            CHECK(st.predictive_sd[i] == Approx(sd_sum / U).epsilon(1e-5));
        }
        CHECK(clipped_pairs > 0);
        check_order(st.by_uncertainty, I, [&](uint32_t i) { return st.predictive_sd[i]; });
        check_order(st.by_mean, I, [&](uint32_t i) { return st.predictive_mean[i]; });
    }
}

TEST_CASE("with no known customer the predictive figures are the unseen-customer mixture") {
    // Direct computation: under sample s an unseen customer's rating is
    // Normal(g + c_i + mu_U.v_i, 1/tau + v_i' Lambda_U^-1 v_i + 1/lambda_b)
    // (BPMF's hyperprior, Salakhutdinov & Mnih 2008); the mixture's mean and
    // sd over the samples by the law of total variance.
    Posterior p = simulate_posterior({.users = 2, .items = 7, .rank = 3, .samples = 6, .chains = 1, .seed = 4});
    p = without_user(without_user(p, 1), 0);
    REQUIRE(p.num_users == 0);
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t S = p.num_samples, K = p.rank;
    for (uint32_t i = 0; i < p.num_items; ++i) {
        double m1 = 0.0, m2 = 0.0;
        for (uint32_t s = 0; s < S; ++s) {
            const Eigen::MatrixXd sigma = precision_of(p.user_lambda, s, K).inverse();
            Eigen::VectorXd v(K), mu(K);
            for (uint32_t k = 0; k < K; ++k) {
                v(k) = p.item_factor(s, i)[k];
                mu(k) = p.user_mu[size_t(s) * K + k];
            }
            const double mean = double(p.global_mean) + p.item_bias_of(s, i) + mu.dot(v);
            const double var = 1.0 / p.noise_precision[s] + v.dot(sigma * v) + 1.0 / p.user_bias_precision[s];
            m1 += mean / S;
            m2 += (var + mean * mean) / S;
        }
        INFO("item " << i);
        // Both in double from the same floats; two inversion routes: 1e-9.
        CHECK(st.predictive_mean[i] == Approx(std::clamp(m1, double(p.scale.min), double(p.scale.max))).epsilon(1e-9));
        CHECK(st.predictive_sd[i] == Approx(std::sqrt(m2 - m1 * m1)).epsilon(1e-9));
    }
}

TEST_CASE("the most similar among given items equal a direct averaged cosine") {
    const Posterior p = simulate_posterior({.users = 4, .items = 30, .rank = 4, .samples = 10, .chains = 2, .seed = 31});
    const ItemStatistics st = compute_item_statistics(p);
    const uint32_t target = 5;
    // The target itself and a repeat are in the list: both must be skipped.
    const std::vector<uint32_t> among = {3, 5, 11, 12, 17, 20, 11, 29};
    const auto got = most_similar_among(p, st, target, among, 3);
    std::vector<std::pair<double, uint32_t>> want;  // (-similarity, item): sorts best first, ties by index
    for (uint32_t j : {3u, 11u, 12u, 17u, 20u, 29u}) {
        double total = 0.0;
        for (uint32_t s = 0; s < p.num_samples; ++s) total += cosine(p, s, target, j);
        want.emplace_back(-total / p.num_samples, j);
    }
    std::sort(want.begin(), want.end());
    REQUIRE(got.size() == 3);
    for (size_t k = 0; k < 3; ++k) {
        INFO("position " << k);
        CHECK(got[k].item == want[k].second);
        // Norms are stored as floats: agreement to float rounding, 1e-6.
        CHECK(got[k].similarity == Approx(-want[k].first).margin(1e-6));
    }
    CHECK(most_similar_among(p, st, target, among, 10).size() == 6);
    CHECK(most_similar_among(p, st, target, std::vector<uint32_t>{5}, 3).empty());
    CHECK_THROWS_AS(most_similar_among(p, st, target, std::vector<uint32_t>{30}, 3), std::out_of_range);
    CHECK_THROWS_AS(most_similar_among(p, st, 30, among, 3), std::out_of_range);
}

TEST_CASE("the most similar among given items for several targets at once equal each target's direct averaged cosine") {
    // 7 distinct rated items: one partial block of the side-by-side sums.
    const Posterior p = simulate_posterior({.users = 4, .items = 30, .rank = 5, .samples = 10, .chains = 2, .seed = 37});
    const ItemStatistics st = compute_item_statistics(p);
    // Targets inside and outside the rated list, and a target twice.
    const std::vector<uint32_t> targets = {5, 11, 0, 29, 5};
    const std::vector<uint32_t> among = {3, 5, 11, 12, 17, 20, 11, 29};
    const auto got = most_similar_among_each(p, st, targets, among, 4);
    REQUIRE(got.size() == targets.size());
    for (size_t t = 0; t < targets.size(); ++t) {
        INFO("target " << targets[t]);
        std::vector<std::pair<double, uint32_t>> want;  // (-similarity, item): best first, ties by index
        for (uint32_t j : {3u, 5u, 11u, 12u, 17u, 20u, 29u}) {
            if (j == targets[t]) continue;
            double total = 0.0;
            for (uint32_t s = 0; s < p.num_samples; ++s) total += cosine(p, s, targets[t], j);
            want.emplace_back(-total / p.num_samples, j);
        }
        std::sort(want.begin(), want.end());
        REQUIRE(got[t].size() == 4);
        for (size_t k = 0; k < 4; ++k) {
            INFO("position " << k);
            CHECK(got[t][k].item == want[k].second);
            // Norms are stored as floats: agreement to float rounding, 1e-6.
            CHECK(got[t][k].similarity == Approx(-want[k].first).margin(1e-6));
        }
        // The same bits as the plain per-pair loop over samples (the dot
        // product in double, k in order, over the stored norms).
        for (const SimilarItem& got_k : got[t]) {
            double total = 0.0;
            for (uint32_t s = 0; s < p.num_samples; ++s) {
                const double denom = double(st.item_norm[size_t(s) * p.num_items + targets[t]]) *
                                     st.item_norm[size_t(s) * p.num_items + got_k.item];
                double dot = 0.0;
                for (uint32_t k = 0; k < p.rank; ++k)
                    dot += double(p.item_factor(s, targets[t])[k]) * p.item_factor(s, got_k.item)[k];
                if (denom > 0.0) total += dot / denom;
            }
            CHECK(got_k.similarity == total / p.num_samples);
        }
        // The one-target call gives the same bits.
        const auto alone = most_similar_among(p, st, targets[t], among, 4);
        REQUIRE(alone.size() == got[t].size());
        for (size_t k = 0; k < alone.size(); ++k) {
            CHECK(alone[k].item == got[t][k].item);
            CHECK(alone[k].similarity == got[t][k].similarity);
        }
    }
    CHECK(most_similar_among_each(p, st, std::vector<uint32_t>{}, among, 3).empty());
    CHECK_THROWS_AS(most_similar_among_each(p, st, std::vector<uint32_t>{1, 30}, among, 3), std::out_of_range);
    CHECK_THROWS_AS(most_similar_among_each(p, st, targets, std::vector<uint32_t>{30}, 3), std::out_of_range);
}
