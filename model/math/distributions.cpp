#include "model/math/distributions.hpp"

#include <cmath>
#include <stdexcept>
#include <string>

#include "model/error.hpp"

namespace credence {

double draw_gamma(Rng& rng, double shape, double rate) {
    if (!(rate > 0.0) || !std::isfinite(rate))
        throw std::invalid_argument("gamma rate must be positive and finite, got " + std::to_string(rate));
    return rng.gamma(shape) / rate;
}

Eigen::MatrixXd draw_wishart(Rng& rng, const Eigen::MatrixXd& scale, double dof) {
    const Eigen::Index k = scale.rows();
    if (scale.cols() != k || k == 0) throw std::invalid_argument("Wishart scale must be a non-empty square matrix");
    if (!(dof > static_cast<double>(k) - 1.0) || !std::isfinite(dof))
        throw std::invalid_argument("Wishart degrees of freedom must exceed dimension - 1 (got " +
                                    std::to_string(dof) + " for dimension " + std::to_string(k) + ")");
    Eigen::LLT<Eigen::MatrixXd> llt(scale);
    if (llt.info() != Eigen::Success || !llt.matrixLLT().allFinite())
        throw NumericError("Wishart scale matrix is not positive definite (smallest diagonal " +
                           std::to_string(scale.diagonal().minCoeff()) + ")");
    Eigen::MatrixXd a = Eigen::MatrixXd::Zero(k, k);
    for (Eigen::Index i = 0; i < k; ++i) {
        // chi^2(m) = 2 * Gamma(m / 2, 1)
        a(i, i) = std::sqrt(2.0 * rng.gamma((dof - static_cast<double>(i)) / 2.0));
        for (Eigen::Index j = 0; j < i; ++j) a(i, j) = rng.normal();
    }
    const Eigen::MatrixXd la = llt.matrixL() * a;  // lower triangular times lower triangular
    Eigen::MatrixXd out = la * la.transpose();
    // Symmetrize exactly so later Cholesky factorizations see a symmetric matrix.
    return 0.5 * (out + out.transpose());
}

void draw_normal_from_precision_factor(Rng& rng, const Eigen::VectorXd& mean,
                                       const Eigen::Ref<const Eigen::MatrixXd>& lower_factor, Eigen::VectorXd& out) {
    const Eigen::Index d = mean.size();
    out.resize(d);
    for (Eigen::Index i = 0; i < d; ++i) out[i] = rng.normal();
    // Solve L^T x = z: x has covariance L^-T L^-1 = (L L^T)^-1.
    lower_factor.triangularView<Eigen::Lower>().transpose().solveInPlace(out);
    out += mean;
}

Eigen::VectorXd draw_normal_from_precision(Rng& rng, const Eigen::VectorXd& mean,
                                           const Eigen::MatrixXd& precision) {
    Eigen::LLT<Eigen::MatrixXd> llt(precision);
    if (llt.info() != Eigen::Success || !llt.matrixLLT().allFinite())
        throw NumericError("normal draw: precision matrix is not positive definite (smallest diagonal " +
                           std::to_string(precision.diagonal().minCoeff()) + ")");
    Eigen::VectorXd out;
    draw_normal_from_precision_factor(rng, mean, llt.matrixLLT(), out);
    return out;
}

}  // namespace credence
