// Tests for model/normal_wishart: sufficient statistics, the closed-form
// posterior update checked against independently computed numbers, and the
// joint draw's moments.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstdio>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include "model/error.hpp"
#include "tests/support/python_reference.hpp"
#include "model/fit/normal_wishart.hpp"

using namespace credence;

using credence::testing::run_python_inline;

TEST_CASE("factor statistics: count, mean and scatter about the mean") {
    // Rows (1,2), (3,0), (5,4): mean (3,2); deviations (-2,0), (0,-2), (2,2);
    // scatter = [[8, 4], [4, 8]] by hand.
    const std::vector<float> rows{1, 2, 3, 0, 5, 4};
    const FactorStatistics st = factor_statistics(rows.data(), 3, 2, 1);
    CHECK(st.n == 3.0);
    CHECK(st.mean[0] == 3.0);
    CHECK(st.mean[1] == 2.0);
    CHECK(st.scatter(0, 0) == 8.0);
    CHECK(st.scatter(0, 1) == 4.0);
    CHECK(st.scatter(1, 0) == 4.0);
    CHECK(st.scatter(1, 1) == 8.0);
    const FactorStatistics none = factor_statistics(rows.data(), 0, 2, 1);
    CHECK(none.n == 0.0);
    CHECK(none.mean.isZero());
}

// factor_statistics sums rows in fixed blocks of 1024 (model/fit/normal_wishart.cpp),
// so 5,000 rows span five blocks. The reference is the two-pass sum in long
// double; the double blocked sums of n = 5,000 terms of size about 1 are
// within gamma_n (n * 2^-53, about 6e-13; Higham, Accuracy and Stability of
// Numerical Algorithms, 2nd ed., section 3.1) of the sum of magnitudes, so
// 1e-9 relative is a generous bound that any wrong term would still break.
TEST_CASE("factor statistics over several row blocks are the same on 1 and 2 threads and match a long-double sum") {
    const uint64_t n = 5000;
    const uint32_t dim = 3;
    std::vector<float> rows(n * dim);
    for (uint64_t r = 0; r < n; ++r)
        for (uint32_t k = 0; k < dim; ++k) rows[r * dim + k] = float(std::sin(0.37 * double(r) + k) + 0.1 * k);
    const FactorStatistics one = factor_statistics(rows.data(), n, dim, 1);
    const FactorStatistics two = factor_statistics(rows.data(), n, dim, 2);
    CHECK(one.mean == two.mean);
    CHECK(one.scatter == two.scatter);
    std::vector<long double> mean(dim, 0.0L);
    for (uint64_t r = 0; r < n; ++r)
        for (uint32_t k = 0; k < dim; ++k) mean[k] += rows[r * dim + k];
    for (uint32_t k = 0; k < dim; ++k) mean[k] /= n;
    for (uint32_t j = 0; j < dim; ++j) {
        CHECK(one.mean[j] == Approx(double(mean[j])).epsilon(1e-9).margin(1e-12));
        for (uint32_t k = 0; k < dim; ++k) {
            long double sum = 0.0L;
            for (uint64_t r = 0; r < n; ++r) sum += (rows[r * dim + j] - mean[j]) * (rows[r * dim + k] - mean[k]);
            CHECK(one.scatter(j, k) == Approx(double(sum)).epsilon(1e-9).margin(1e-9));
        }
    }
}

TEST_CASE("one-dimensional posterior update matches hand arithmetic") {
    // Conjugate update (Murphy 2007, "Conjugate Bayesian analysis of the
    // Gaussian distribution", Normal-Wishart section; Bishop PRML 2.3.6):
    // kappa_n = kappa_0 + n, nu_n = nu_0 + n, mu_n = (kappa_0 mu_0 + n xbar)/kappa_n,
    // W_n^-1 = W_0^-1 + S + kappa_0 n/kappa_n (xbar - mu_0)^2.
    // Data {1, 2, 3}; prior mu0 = 0, beta0 = 2, W0 = 1, nu0 = 1:
    // n = 3, xbar = 2, S = 1 + 0 + 1 = 2; beta_n = 5, nu_n = 4, mu_n = 6/5 = 1.2,
    // W_n^-1 = 1 + 2 + (6/5)(4) = 7.8, so W_n = 1/7.8.
    const std::vector<float> rows{1, 2, 3};
    NormalWishart prior;
    prior.mu = Eigen::VectorXd::Zero(1);
    prior.beta = 2.0;
    prior.w = Eigen::MatrixXd::Identity(1, 1);
    prior.nu = 1.0;
    const NormalWishart post = normal_wishart_posterior(prior, factor_statistics(rows.data(), 3, 1, 1));
    CHECK(post.beta == Approx(5.0).epsilon(1e-14));
    CHECK(post.nu == Approx(4.0).epsilon(1e-14));
    CHECK(post.mu[0] == Approx(1.2).epsilon(1e-14));
    CHECK(post.w(0, 0) == Approx(1.0 / 7.8).epsilon(1e-12));
}

TEST_CASE("two-dimensional posterior update matches an independent numpy computation") {
    // Same closed form (Murphy 2007; Bishop PRML 2.3.6), evaluated by numpy
    // from the raw data as the outside reference.
    const std::vector<float> rows{0.5f, 1.0f, -1.0f, 2.0f, 2.0f, 0.0f, 1.5f, -0.5f};
    NormalWishart prior;
    prior.mu = Eigen::Vector2d(1.0, -1.0);
    prior.beta = 2.0;
    prior.w.resize(2, 2);
    prior.w << 2.0, 0.5, 0.5, 1.0;
    prior.nu = 3.0;
    const NormalWishart post = normal_wishart_posterior(prior, factor_statistics(rows.data(), 4, 2, 1));
    const std::string ref = run_python_inline(
        "import numpy as np\n"
        "x=np.array([[0.5,1.0],[-1.0,2.0],[2.0,0.0],[1.5,-0.5]]); n=len(x)\n"
        "m0=np.array([1.0,-1.0]); k0=2.0; W0=np.array([[2.0,0.5],[0.5,1.0]]); nu0=3.0\n"
        "xb=x.mean(0); S=sum(np.outer(r-xb,r-xb) for r in x); kn=k0+n\n"
        "mn=(k0*m0+n*xb)/kn; Wn=np.linalg.inv(np.linalg.inv(W0)+S+k0*n/kn*np.outer(xb-m0,xb-m0))\n"
        "print(kn, nu0+n, *mn, *Wn.ravel())");
    if (ref.empty()) {
        WARN("NOTICE: /usr/bin/python3 with numpy not found; skipping the numpy cross-check");
        return;
    }
    std::istringstream in(ref);
    std::vector<double> v(8);
    for (auto& x : v) in >> x;
    REQUIRE(in);
    CHECK(post.beta == Approx(v[0]).epsilon(1e-12));
    CHECK(post.nu == Approx(v[1]).epsilon(1e-12));
    CHECK(post.mu[0] == Approx(v[2]).epsilon(1e-12));
    CHECK(post.mu[1] == Approx(v[3]).epsilon(1e-12));
    for (int j = 0; j < 4; ++j) CHECK(post.w(j / 2, j % 2) == Approx(v[4 + j]).epsilon(1e-10));
    CHECK(post.w(0, 1) == post.w(1, 0));
}

TEST_CASE("the posterior update rejects a prior scale that is not positive definite") {
    NormalWishart prior;
    prior.mu = Eigen::VectorXd::Zero(2);
    prior.w.resize(2, 2);
    prior.w << 1.0, 3.0, 3.0, 1.0;
    prior.nu = 2.0;
    const std::vector<float> rows{1, 2};
    CHECK_THROWS_AS(normal_wishart_posterior(prior, factor_statistics(rows.data(), 1, 2, 1)), NumericError);
}

TEST_CASE("joint draws: E[Lambda] = nu W and E[mu] = mu") {
    // Lambda ~ Wishart(W, nu) has mean nu W and Var[L_ij] = nu (W_ij^2 + W_ii W_jj)
    // (standard Wishart moments); mu | Lambda ~ N(mu, (beta Lambda)^-1) has mean mu,
    // and marginal variance E[Lambda^-1]/beta = W^-1 / (beta (nu - K - 1)) (inverse
    // Wishart mean; Bishop PRML Appendix B). Tolerance: 5 standard errors.
    NormalWishart nw;
    nw.mu = Eigen::Vector2d(0.5, -1.5);
    nw.beta = 3.0;
    nw.w.resize(2, 2);
    nw.w << 0.5, 0.1, 0.1, 0.8;
    nw.nu = 9.0;
    const Eigen::MatrixXd mu_cov = nw.w.inverse() / (nw.beta * (nw.nu - 2 - 1));
    Rng rng(31);
    const int n = 100000;
    Eigen::MatrixXd sl = Eigen::MatrixXd::Zero(2, 2);
    Eigen::VectorXd sm = Eigen::VectorXd::Zero(2);
    for (int t = 0; t < n; ++t) {
        const MeanPrecision d = draw_normal_wishart(rng, nw);
        sl += d.lambda;
        sm += d.mu;
    }
    for (int i = 0; i < 2; ++i) {
        CHECK(std::abs(sm[i] / n - nw.mu[i]) < 5 * std::sqrt(mu_cov(i, i) / n));
        for (int j = 0; j < 2; ++j) {
            const double var = nw.nu * (nw.w(i, j) * nw.w(i, j) + nw.w(i, i) * nw.w(j, j));
            CHECK(std::abs(sl(i, j) / n - nw.nu * nw.w(i, j)) < 5 * std::sqrt(var / n));
        }
    }
}
