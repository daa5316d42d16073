#include "model/fit/column_moves.hpp"

#include <cmath>
#include <vector>

#include "model/math/random.hpp"

namespace credence {

namespace {

constexpr double kTwoPi = 6.283185307179586476925286766559;

// Conditional prior mean of coordinate k of every row given its other
// coordinates: mu_k - sum_{l != k} Lambda_kl (x_l - mu_l) / Lambda_kk.
void conditional_means(const FactorRows& f, uint32_t rows, uint32_t rank, uint32_t k, const Eigen::VectorXd& mu,
                       const Eigen::MatrixXd& lambda, std::vector<double>& out) {
    out.resize(rows);
    const double lkk = lambda(k, k);
    for (uint32_t r = 0; r < rows; ++r) {
        const float* x = f.data() + size_t(r) * rank;
        double s = 0.0;
        for (uint32_t l = 0; l < rank; ++l)
            if (l != k) s += lambda(k, l) * (double(x[l]) - mu(l));
        out[r] = mu(k) - s / lkk;
    }
}

// Log-likelihood of item column v (with the users' column k integrated out
// against N(m_a, 1/lambda)), up to a constant; also the per-user sums.
double collapsed_log_likelihood(const CsrMatrix& by_user, const std::vector<double>& resid_k,
                                const std::vector<float>& v, const std::vector<double>& m, double lambda, double tau,
                                std::vector<double>* s_out, std::vector<double>* p_out) {
    double total = 0.0;
    for (uint32_t a = 0; a < by_user.num_rows; ++a) {
        double s = 0.0, p = 0.0;
        for (uint64_t e = by_user.offsets[a]; e < by_user.offsets[a + 1]; ++e) {
            const double x = v[by_user.index[e]];
            s += x * x;
            p += resid_k[e] * x;
        }
        const double prec = lambda + tau * s;
        const double q = p - m[a] * s;
        total -= 0.5 * (std::log(prec) + tau * (m[a] * m[a] * s - 2.0 * m[a] * p) - tau * tau * q * q / prec);
        if (s_out) (*s_out)[a] = s;
        if (p_out) (*p_out)[a] = p;
    }
    return total;
}

}  // namespace

void apply_column_moves(const GibbsData& data, const FitOptions& /*options*/, const SweepKey& key, GibbsState& st) {
    const CsrMatrix& by_user = *data.by_user;
    const uint32_t users = by_user.num_rows, items = data.by_item->num_rows, rank = st.rank;
    const double tau = st.noise_precision;
    // Residuals in by-user order.
    std::vector<double> resid(by_user.nnz());
    for (uint32_t a = 0; a < users; ++a) {
        const float* u = st.user_factors.data() + size_t(a) * rank;
        for (uint64_t e = by_user.offsets[a]; e < by_user.offsets[a + 1]; ++e) {
            const uint32_t b = by_user.index[e];
            const float* v = st.item_factors.data() + size_t(b) * rank;
            double pred = data.global_mean;
            if (st.biases) pred += double(st.user_bias[a]) + double(st.item_bias[b]);
            for (uint32_t l = 0; l < rank; ++l) pred += double(u[l]) * double(v[l]);
            resid[e] = double(by_user.value[e]) - pred;
        }
    }
    std::vector<double> m_user, m_item, resid_k(resid.size()), s(users), p(users);
    std::vector<float> v_now(items), v_new(items);
    std::vector<double> nu(items);
    for (uint32_t k = 0; k < rank; ++k) {
        Rng rng = Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::column_moves, k);
        conditional_means(st.user_factors, users, rank, k, st.user_mu, st.user_lambda, m_user);
        conditional_means(st.item_factors, items, rank, k, st.item_mu, st.item_lambda, m_item);
        const double lam_u = st.user_lambda(k, k);
        const double sd_v = 1.0 / std::sqrt(st.item_lambda(k, k));
        for (uint32_t a = 0; a < users; ++a) {
            const double uk = st.user_factors.data()[size_t(a) * rank + k];
            for (uint64_t e = by_user.offsets[a]; e < by_user.offsets[a + 1]; ++e)
                resid_k[e] = resid[e] + uk * double(st.item_factors.data()[size_t(by_user.index[e]) * rank + k]);
        }
        for (uint32_t b = 0; b < items; ++b) v_now[b] = st.item_factors.data()[size_t(b) * rank + k];
        // One elliptical slice step (Murray, Adams & MacKay 2010, Fig. 2).
        rng.normals(nu.data(), nu.size());
        const double log_y = collapsed_log_likelihood(by_user, resid_k, v_now, m_user, lam_u, tau, nullptr, nullptr) +
                             std::log(rng.uniform());
        double theta = kTwoPi * rng.uniform();
        double lo = theta - kTwoPi, hi = theta;
        for (int tries = 0; tries < 200; ++tries) {
            const double c = std::cos(theta), sn = std::sin(theta);
            for (uint32_t b = 0; b < items; ++b)
                v_new[b] = float(m_item[b] + (double(v_now[b]) - m_item[b]) * c + sd_v * nu[b] * sn);
            if (collapsed_log_likelihood(by_user, resid_k, v_new, m_user, lam_u, tau, nullptr, nullptr) > log_y) break;
            if (theta < 0.0) lo = theta; else hi = theta;
            theta = lo + (hi - lo) * rng.uniform();
            if (tries == 199) v_new = v_now;
        }
        collapsed_log_likelihood(by_user, resid_k, v_new, m_user, lam_u, tau, &s, &p);
        for (uint32_t b = 0; b < items; ++b) st.item_factors.data()[size_t(b) * rank + k] = v_new[b];
        // The users' column k from its exact conditional given the new items' column.
        for (uint32_t a = 0; a < users; ++a) {
            const double prec = lam_u + tau * s[a];
            const double mean = (lam_u * m_user[a] + tau * p[a]) / prec;
            const float uk = float(mean + rng.normal() / std::sqrt(prec));
            st.user_factors.data()[size_t(a) * rank + k] = uk;
            for (uint64_t e = by_user.offsets[a]; e < by_user.offsets[a + 1]; ++e)
                resid[e] = resid_k[e] - double(uk) * double(v_new[by_user.index[e]]);
        }
    }
    double sse = 0.0;
    for (double r : resid) sse += r * r;
    st.sse = sse;
}

}  // namespace credence
