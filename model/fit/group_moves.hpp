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

// Applies the user shift, the item shift and the bias shift in that order,
// in place, with randomness from Rng::keyed(key.seed, key.chain, key.sweep,
// StreamBlock::group_moves, move). Needs a state whose hyperparameters and
// bias precisions are those of the latest sweep. Does nothing without
// biases. Throws NumericError (naming chain and sweep) if a conditional
// precision is not positive definite. Serial: O((U + I) K^2) work.
void apply_group_moves(const FitOptions& options, const SweepKey& key, GibbsState& state);

}  // namespace credence
