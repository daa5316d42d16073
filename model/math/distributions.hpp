// Random draws the Gibbs sampler needs beyond the basic variates of Rng:
// Gamma with a rate, Wishart (Bartlett decomposition) and the multivariate
// normal given its PRECISION (the form every BPMF conditional arrives in).
// All draws consume only the Rng passed in, so keyed streams stay keyed.
#pragma once
#include <Eigen/Dense>

#include "model/math/random.hpp"

namespace credence {

// Gamma(shape, rate): density proportional to x^(shape-1) exp(-rate x), mean shape/rate.
// Needs shape > 0 and rate > 0, both finite; throws std::invalid_argument
// otherwise (a bug: fit_bpmf validates the prior before sampling).
double draw_gamma(Rng& rng, double shape, double rate);

// Wishart(W, nu) with scale matrix W (K x K, symmetric positive definite) and
// nu > K - 1 degrees of freedom; mean nu * W. Uses the Bartlett
// decomposition: with W = L L^T and A lower triangular, A_ii^2 ~ chi^2(nu - i)
// (i = 0..K-1) and A_ij ~ N(0, 1) below the diagonal, the draw is L A A^T L^T.
// Throws std::invalid_argument for nu <= K - 1 and NumericError when W is
// not positive definite. The result is exactly symmetric.
Eigen::MatrixXd draw_wishart(Rng& rng, const Eigen::MatrixXd& scale, double dof);

// x ~ Normal(mean, precision^-1) given the LOWER Cholesky factor L of the
// precision (precision = L L^T): x = mean + L^-T z with z standard normal.
// Only the lower triangle of `lower_factor` is read (so an LLT's packed
// matrixLLT() can be passed without a copy). Writes into `out` (resized to
// mean.size()).
void draw_normal_from_precision_factor(Rng& rng, const Eigen::VectorXd& mean,
                                       const Eigen::Ref<const Eigen::MatrixXd>& lower_factor, Eigen::VectorXd& out);

// x ~ Normal(mean, precision^-1). Throws NumericError when `precision` is
// not positive definite.
Eigen::VectorXd draw_normal_from_precision(Rng& rng, const Eigen::VectorXd& mean,
                                           const Eigen::MatrixXd& precision);

}  // namespace credence
