// Tests for model/distributions: Gamma with a rate, Wishart by Bartlett
// decomposition and the normal drawn from a precision matrix have the
// textbook moments. Every statistical check uses a fixed seed and a
// tolerance of 5 Monte Carlo standard errors (a correct sampler fails a
// given check with probability below 1e-6).
#include <catch2/catch.hpp>

#include <cmath>
#include <cstdio>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include "model/math/distributions.hpp"
#include "model/error.hpp"
#include "tests/support/python_reference.hpp"

using namespace credence;

using credence::testing::run_python_inline;

TEST_CASE("draw_gamma has mean shape/rate and variance shape/rate^2") {
    // Gamma(a, b) with rate b: mean a/b, variance a/b^2 (Bishop, PRML, Appendix B).
    // Sample variance sd: sqrt((mu4 - sigma^4)/n), mu4 = (3a^2 + 6a)/b^4.
    for (auto [a, b] : {std::pair{0.5, 2.0}, std::pair{3.0, 0.25}, std::pair{101.0, 40.0}}) {
        Rng rng(2024);
        const int n = 200000;
        double s = 0, s2 = 0;
        for (int i = 0; i < n; ++i) {
            const double g = draw_gamma(rng, a, b);
            s += g;
            s2 += g * g;
        }
        const double mean = s / n, var = s2 / n - mean * mean;
        const double sigma2 = a / (b * b), mu4 = (3 * a * a + 6 * a) / std::pow(b, 4);
        CHECK(std::abs(mean - a / b) < 5 * std::sqrt(sigma2 / n));
        CHECK(std::abs(var - sigma2) < 5 * std::sqrt((mu4 - sigma2 * sigma2) / n));
    }
    Rng rng(1);
    CHECK_THROWS_AS(draw_gamma(rng, 1.0, 0.0), std::invalid_argument);
    CHECK_THROWS_AS(draw_gamma(rng, -1.0, 1.0), std::invalid_argument);
}

TEST_CASE("Wishart draws have mean nu*W and variances nu*(W_ij^2 + W_ii*W_jj)") {
    // Moments of Wishart(W, nu): E[X_ij] = nu W_ij, Var[X_ij] = nu (W_ij^2 + W_ii W_jj)
    // (standard Wishart moments; e.g. Bishop, PRML, Appendix B, and scipy.stats.wishart.var).
    Eigen::MatrixXd w(3, 3);
    w << 2.0, 0.6, -0.3,
         0.6, 1.0, 0.2,
        -0.3, 0.2, 0.5;
    const double nu = 4.5;
    const int n = 100000;
    Rng rng(77);
    Eigen::MatrixXd s1 = Eigen::MatrixXd::Zero(3, 3), s2 = s1, s3 = s1, s4 = s1;
    for (int t = 0; t < n; ++t) {
        const Eigen::MatrixXd x = draw_wishart(rng, w, nu);
        REQUIRE((x - x.transpose()).cwiseAbs().maxCoeff() == 0.0);
        REQUIRE(x.llt().info() == Eigen::Success);
        s1 += x;
        s2 += x.cwiseProduct(x);
        s3 += x.cwiseProduct(x).cwiseProduct(x);
        s4 += x.cwiseProduct(x).cwiseProduct(x).cwiseProduct(x);
    }
    for (int i = 0; i < 3; ++i)
        for (int j = 0; j < 3; ++j) {
            const double m = s1(i, j) / n, e2 = s2(i, j) / n, e3 = s3(i, j) / n, e4 = s4(i, j) / n;
            const double var = e2 - m * m;
            const double expected_var = nu * (w(i, j) * w(i, j) + w(i, i) * w(j, j));
            // Standard error of the sample mean from the true variance; of the
            // sample variance from the empirical fourth central moment.
            CHECK(std::abs(m - nu * w(i, j)) < 5 * std::sqrt(expected_var / n));
            const double mu4 = e4 - 4 * m * e3 + 6 * m * m * e2 - 3 * m * m * m * m;
            CHECK(std::abs(var - expected_var) < 5 * std::sqrt((mu4 - var * var) / n));
        }

    // Outside reference: scipy.stats.wishart's own mean and variance for the same W and nu.
    const std::string ref = run_python_inline(
        "import numpy as np\nfrom scipy.stats import wishart\n"
        "w=np.array([[2.0,0.6,-0.3],[0.6,1.0,0.2],[-0.3,0.2,0.5]])\n"
        "d=wishart(df=4.5, scale=w)\n"
        "print(\" \".join(repr(v) for v in np.concatenate([d.mean().ravel(), d.var().ravel()])))");
    if (ref.empty()) {
        WARN("NOTICE: /usr/bin/python3 with scipy not found; skipping the scipy.stats.wishart cross-check");
        return;
    }
    std::istringstream in(ref);
    std::vector<double> v(18);
    for (auto& x : v) in >> x;
    REQUIRE(in);
    for (int i = 0; i < 3; ++i)
        for (int j = 0; j < 3; ++j) {
            const double m = s1(i, j) / n, var = s2(i, j) / n - m * m;
            const double scipy_mean = v[i * 3 + j], scipy_var = v[9 + i * 3 + j];
            CHECK(std::abs(m - scipy_mean) < 5 * std::sqrt(scipy_var / n));
            // Relative 5% on the variance: its Monte Carlo sd here is below 1% (checked above).
            CHECK(std::abs(var - scipy_var) < 0.05 * scipy_var);
        }
}

TEST_CASE("Wishart rejects impossible parameters") {
    Rng rng(3);
    CHECK_THROWS_AS(draw_wishart(rng, Eigen::MatrixXd::Identity(3, 3), 1.5), std::invalid_argument);
    Eigen::MatrixXd bad(2, 2);
    bad << 1.0, 2.0, 2.0, 1.0;  // eigenvalues 3 and -1
    CHECK_THROWS_AS(draw_wishart(rng, bad, 5.0), NumericError);
}

TEST_CASE("normal drawn from a precision has the right mean and covariance") {
    // x ~ N(m, P^-1). For Gaussian data the sample covariance entry S_ij has
    // variance (C_ii C_jj + C_ij^2)/n (Anderson, An Introduction to
    // Multivariate Statistical Analysis, Wishart moments of the scatter).
    Eigen::MatrixXd p(3, 3);
    p << 4.0, 1.0, 0.5,
         1.0, 3.0, -0.8,
         0.5, -0.8, 2.0;
    Eigen::VectorXd m(3);
    m << 1.0, -2.0, 0.5;
    const Eigen::MatrixXd c = p.inverse();
    const int n = 200000;
    Rng rng(8);
    Eigen::VectorXd s1 = Eigen::VectorXd::Zero(3);
    Eigen::MatrixXd s2 = Eigen::MatrixXd::Zero(3, 3);
    for (int t = 0; t < n; ++t) {
        const Eigen::VectorXd x = draw_normal_from_precision(rng, m, p);
        s1 += x;
        s2 += (x - m) * (x - m).transpose();
    }
    const Eigen::VectorXd mean = s1 / n;
    const Eigen::MatrixXd cov = s2 / n;  // about the true mean
    for (int i = 0; i < 3; ++i) {
        CHECK(std::abs(mean[i] - m[i]) < 5 * std::sqrt(c(i, i) / n));
        for (int j = 0; j < 3; ++j)
            CHECK(std::abs(cov(i, j) - c(i, j)) < 5 * std::sqrt((c(i, i) * c(j, j) + c(i, j) * c(i, j)) / n));
    }
    Eigen::MatrixXd bad = p;
    bad(2, 2) = -1.0;
    CHECK_THROWS_AS(draw_normal_from_precision(rng, m, bad), NumericError);
}
