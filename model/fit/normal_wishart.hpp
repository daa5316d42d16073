// The Normal-Wishart prior on a factor population's mean and precision, its
// closed-form posterior given sufficient statistics, and a joint draw.
//
// Parameterization (Bishop, PRML 2.3.6; BPMF eq. 14): Lambda ~ Wishart(W, nu),
// mu | Lambda ~ Normal(mu0, (beta Lambda)^-1).
#pragma once
#include <cstdint>

#include <Eigen/Dense>

#include "model/math/random.hpp"

namespace credence {

struct NormalWishart {
    Eigen::VectorXd mu;  // mean of mu
    double beta = 1.0;   // scales Lambda in mu's precision, > 0
    Eigen::MatrixXd w;   // Wishart scale matrix, symmetric positive definite
    double nu = 1.0;     // Wishart degrees of freedom, > dimension - 1
};

// Sufficient statistics of n vectors x_1..x_n.
struct FactorStatistics {
    double n = 0.0;
    Eigen::VectorXd mean;     // (1/n) sum x_j  (zeros when n == 0)
    Eigen::MatrixXd scatter;  // sum (x_j - mean)(x_j - mean)^T, symmetric
};

// Statistics of `count` rows of a row-major [count][dim] float array,
// accumulated in double in fixed blocks of rows (each in row order, the
// blocks' sums in block order), so the result never depends on the team:
// `threads` > 0 caps it, 0 is OpenMP's default.
FactorStatistics factor_statistics(const float* rows, uint64_t count, uint32_t dim, int threads);

// The posterior given the statistics:
//   beta_n = beta0 + n,  nu_n = nu0 + n,
//   mu_n   = (beta0 mu0 + n xbar) / beta_n,
//   W_n^-1 = W0^-1 + scatter + (beta0 n / beta_n) (xbar - mu0)(xbar - mu0)^T.
// W_n is symmetrized. Throws NumericError if W0 or the result is not
// positive definite, std::invalid_argument if the dimensions of the prior
// and the statistics disagree (a bug in the caller).
NormalWishart normal_wishart_posterior(const NormalWishart& prior, const FactorStatistics& stats);

struct MeanPrecision {
    Eigen::VectorXd mu;
    Eigen::MatrixXd lambda;
};

// One draw of (mu, Lambda) from `nw`: Lambda ~ Wishart(w, nu), then
// mu ~ Normal(mu, (beta Lambda)^-1).
MeanPrecision draw_normal_wishart(Rng& rng, const NormalWishart& nw);

}  // namespace credence
