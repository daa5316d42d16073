#include "model/fit/normal_wishart.hpp"

#include <omp.h>

#include <algorithm>
#include <stdexcept>
#include <string>
#include <vector>

#include "model/error.hpp"
#include "model/fit/row_kernels.hpp"
#include "model/math/cpu_level.hpp"
#include "model/math/distributions.hpp"

namespace credence {

namespace {
// Rows per block of the sums below: blocks are fixed whatever the team.
constexpr uint64_t kStatisticsBlockRows = 1024;
}  // namespace

FactorStatistics factor_statistics(const float* rows, uint64_t count, uint32_t dim, int threads) {
    FactorStatistics st;
    st.n = static_cast<double>(count);
    st.mean = Eigen::VectorXd::Zero(dim);
    st.scatter = Eigen::MatrixXd::Zero(dim, dim);
    if (count == 0) return st;
    const uint64_t blocks = (count + kStatisticsBlockRows - 1) / kStatisticsBlockRows;
    const size_t cells = size_t(dim) * dim;
    // Per block: [dim] sums, then the [dim][dim] lower triangle (row-major).
    std::vector<double> partial(blocks * (dim + cells), 0.0);
    const int team = threads > 0 ? threads : omp_get_max_threads();
    const size_t stride = row_kernels::padded(dim);
    const row_kernels::Table& kernels = row_kernels::table_for(active_cpu_level());
#pragma omp parallel num_threads(team)
    {
        std::vector<double> d(row_kernels::gram_scratch_doubles(dim)), mean(dim, 0.0), padded(size_t(dim) * stride);
#pragma omp for schedule(dynamic, 1)
        for (int64_t b = 0; b < static_cast<int64_t>(blocks); ++b) {
            double* sum = partial.data() + size_t(b) * (dim + cells);
            const uint64_t end = std::min<uint64_t>(count, uint64_t(b + 1) * kStatisticsBlockRows);
            for (uint64_t r = uint64_t(b) * kStatisticsBlockRows; r < end; ++r)
                for (uint32_t k = 0; k < dim; ++k) sum[k] += rows[r * dim + k];
        }
        // Every thread adds the blocks' sums in block order for itself (the
        // same bits in each), rather than waiting at one more barrier.
        for (uint64_t b = 0; b < blocks; ++b)
            for (uint32_t k = 0; k < dim; ++k) mean[k] += partial[b * (dim + cells) + k];
        for (uint32_t k = 0; k < dim; ++k) mean[k] /= st.n;
#pragma omp single nowait
        for (uint32_t k = 0; k < dim; ++k) st.mean[k] = mean[k];
        // Each block's lower triangle by the row kernels of the active level
        // (every entry summed in row order, the same bits at every level),
        // in a padded buffer, then copied into the block's row-major part.
#pragma omp for schedule(dynamic, 1) nowait
        for (int64_t b = 0; b < static_cast<int64_t>(blocks); ++b) {
            double* lower = partial.data() + size_t(b) * (dim + cells) + dim;
            const uint64_t first = uint64_t(b) * kStatisticsBlockRows;
            const uint64_t end = std::min<uint64_t>(count, first + kStatisticsBlockRows);
            std::fill(padded.begin(), padded.end(), 0.0);
            kernels.gram_rows(rows + first * dim, end - first, dim, mean.data(), nullptr, stride, padded.data(), nullptr,
                              d.data());
            for (uint32_t j = 0; j < dim; ++j)
                for (uint32_t k = 0; k <= j; ++k) lower[size_t(j) * dim + k] = padded[size_t(j) * stride + k];
        }
    }
    std::vector<double> lower(cells, 0.0);
    for (uint64_t b = 0; b < blocks; ++b) {
        const double* part = partial.data() + b * (dim + cells) + dim;
        for (size_t c = 0; c < cells; ++c) lower[c] += part[c];
    }
    for (uint32_t j = 0; j < dim; ++j)
        for (uint32_t k = 0; k <= j; ++k) st.scatter(j, k) = st.scatter(k, j) = lower[size_t(j) * dim + k];
    return st;
}

namespace {
Eigen::MatrixXd spd_inverse(const Eigen::MatrixXd& m, const char* what) {
    Eigen::LLT<Eigen::MatrixXd> llt(0.5 * (m + m.transpose()));
    if (llt.info() != Eigen::Success || !llt.matrixLLT().allFinite())
        throw NumericError(std::string("Normal-Wishart update: ") + what +
                           " is not positive definite (smallest diagonal " +
                           std::to_string(m.diagonal().minCoeff()) + ")");
    Eigen::MatrixXd inv = llt.solve(Eigen::MatrixXd::Identity(m.rows(), m.cols()));
    return 0.5 * (inv + inv.transpose());
}
}  // namespace

NormalWishart normal_wishart_posterior(const NormalWishart& prior, const FactorStatistics& stats) {
    const Eigen::Index k = prior.mu.size();
    if (prior.w.rows() != k || prior.w.cols() != k || stats.mean.size() != k || stats.scatter.rows() != k)
        throw std::invalid_argument("Normal-Wishart update: dimensions of prior and statistics disagree");
    NormalWishart post;
    post.beta = prior.beta + stats.n;
    post.nu = prior.nu + stats.n;
    post.mu = (prior.beta * prior.mu + stats.n * stats.mean) / post.beta;
    const Eigen::VectorXd diff = stats.mean - prior.mu;
    Eigen::MatrixXd w_inv = spd_inverse(prior.w, "the prior scale W0") + stats.scatter +
                            (prior.beta * stats.n / post.beta) * diff * diff.transpose();
    post.w = spd_inverse(w_inv, "the posterior inverse scale");
    return post;
}

MeanPrecision draw_normal_wishart(Rng& rng, const NormalWishart& nw) {
    MeanPrecision out;
    out.lambda = draw_wishart(rng, nw.w, nw.nu);
    out.mu = draw_normal_from_precision(rng, nw.mu, nw.beta * out.lambda);
    return out;
}

}  // namespace credence
