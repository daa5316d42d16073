// Joint moves that the one-block-at-a-time Gibbs sweep cannot make: each
// slides the whole state along a direction the likelihood leaves flat, by a
// draw from the exact conditional along that direction. Used by gibbs_sweep
// after the row and hyperparameter draws.
//
// Method: generalized Gibbs steps over a group acting on the state (Liu & Wu
// 1999, JASA 94; Liu & Sabatti 2000, Biometrika 87): for a transformation
// T_g of the state x, draw g with density proportional to
// pi(T_g x) |J_g(x)| H(dg), H the group's Haar measure; then x <- T_g x. The
// posterior pi is then left exactly invariant. For the translations below the
// Jacobian is 1 and H is Lebesgue measure, so g's conditional is the
// posterior along the translated line, which here is Gaussian in closed form.
//
// Moves (model of model/fit/sampler.hpp, prior mean mu0 = 0):
//   user shift   U_u += d (every u), mu_U += d, c_i -= d . V_i (every i).
//                U . V + c is unchanged, so is the likelihood and the prior
//                of each U_u about mu_U; d's conditional is Normal with
//                precision beta0 Lambda_U + lambda_c sum_i V_i V_i^T and
//                precision-mean -beta0 Lambda_U mu_U + lambda_c sum_i c_i V_i.
//                This is the ridge between the item biases and mu_U . V_i.
//   item shift   the mirror image: V_i += e, mu_V += e, b_u -= e . U_u.
//   bias shift   b_u += a, c_i -= a: precision lambda_b U + lambda_c I,
//                precision-mean -lambda_b sum b + lambda_c sum c.
// The shifts need biases; without them they are skipped.
#pragma once
#include "model/fit/gibbs_sweep.hpp"

namespace credence {

// Applies the scalings and shears of the factor space, then the user shift,
// the item shift and the bias shift in that order, in place, with randomness
// from Rng::keyed(key.seed, key.chain, key.sweep, StreamBlock::group_moves,
// move). Needs a state whose hyperparameters and bias precisions are those of
// the latest sweep; the shifts are skipped without biases. `threads` > 0 caps
// the OpenMP team of the passes over the rows (0: OpenMP's default); the
// result is bit-identical for any value (rows are summed in fixed blocks).
// Throws NumericError (naming chain and sweep) if a conditional precision is
// not positive definite. O((U + I) K^2) work in a few passes over the rows.
void apply_group_moves(const FitOptions& options, const SweepKey& key, GibbsState& state, int threads);

// ---- The moves one at a time. apply_group_moves() is exactly the
// composition below; each move is split into its conditional (what to draw,
// computed from the state and the prior) and its transformation (how a drawn
// group element moves the state). The joint-distribution test
// (tests/model/fit/test_sampler.cpp) uses these to break one move at a time
// and show that it notices. All need a state as for apply_group_moves();
// none throws unless stated. `threads` is as for apply_group_moves().

// A Gaussian conditional in information form: precision P and h = P * mean.
struct ShiftConditional {
    Eigen::MatrixXd precision;  // K x K (1 x 1 for the bias shift), symmetric
    Eigen::VectorXd precision_mean;
};

// The user shift's d (precision beta0 Lambda_U + lambda_c sum_i V_i V_i^T,
// precision-mean -beta0 Lambda_U mu_U + lambda_c sum_i c_i V_i); the item
// shift's e mirrors it. Need biases.
ShiftConditional user_shift_conditional(const FitOptions& options, const GibbsState& state, int threads);
ShiftConditional item_shift_conditional(const FitOptions& options, const GibbsState& state, int threads);
// U_u += d (every u), mu_U += d, c_i -= d . V_i (every i); and the mirror.
void shift_users(GibbsState& state, const Eigen::VectorXd& d, int threads);
void shift_items(GibbsState& state, const Eigen::VectorXd& e, int threads);

// The bias shift's a (1 x 1): precision lambda_b U + lambda_c I,
// precision-mean -lambda_b sum b + lambda_c sum c. Needs biases.
ShiftConditional bias_shift_conditional(const GibbsState& state);
// b_u += a, c_i -= a.
void shift_biases(GibbsState& state, double a);

// Draws x ~ Normal(P^-1 h, P^-1) from `rng`. Throws NumericError (naming
// the key's chain and sweep and `move`) when P is not positive definite.
Eigen::VectorXd draw_shift(const ShiftConditional& conditional, Rng& rng, const SweepKey& key, const char* move);

// The maps of the factor space (below) depend on mu and Lambda alone, so
// they are drawn one after another on those and composed into one matrix
// per side; the factors then move once, by the composition: U_u -> user U_u,
// V_i -> item V_i (item = user^-T, composed from the elementary inverses).
struct FactorMap {
    Eigen::MatrixXd user, item;  // K x K
};
// The identity map of rank K.
FactorMap identity_factor_map(uint32_t rank);
// U_u -> map.user U_u and V_i -> map.item V_i for every row, computed in
// double and rounded once to float32.
void apply_factor_map(GibbsState& state, const FactorMap& map, int threads);

// Scaling of factor coordinate k (U[:, k] *= s, V[:, k] /= s): t = s^2 has
// log(t) = log_eta + y with y ~ exp(-omega cosh y) (needs k < K).
struct ScaleConditional {
    double log_eta = 0.0;  // log sqrt(Lambda_U,kk / Lambda_V,kk)
    double omega = 1.0;    // sqrt(Lambda_U,kk Lambda_V,kk) / w0_scale
};
ScaleConditional scale_conditional(const FitOptions& options, const GibbsState& state, uint32_t k);
// Draws y with density proportional to exp(-omega cosh y); needs omega > 0.
double draw_log_symmetric_gig(Rng& rng, double omega);
// U[:, k] *= s, V[:, k] /= s (composed into `map`; the factors do not move
// until apply_factor_map), with mu and Lambda mapped now (needs s > 0).
void scale_factor_axis(GibbsState& state, FactorMap& map, uint32_t k, double s);

// Shear A = I + c e_i e_j^T (i != j, both < K): c ~ Normal(mean, sd^2).
struct ShearConditional {
    double mean = 0.0;  // (Lambda_U,ij - Lambda_V,ij) / (Lambda_U,ii + Lambda_V,jj)
    double sd = 1.0;    // sqrt(w0_scale / (Lambda_U,ii + Lambda_V,jj))
};
ShearConditional shear_conditional(const FitOptions& options, const GibbsState& state, uint32_t i, uint32_t j);
// U[:, i] += c U[:, j], V[:, j] -= c V[:, i] (composed into `map`), with mu
// and Lambda mapped now.
void shear_factor_axes(GibbsState& state, FactorMap& map, uint32_t i, uint32_t j, double c);
// Makes Lambda_U and Lambda_V exactly symmetric again after the maps.
void symmetrize_precisions(GibbsState& state);

}  // namespace credence
