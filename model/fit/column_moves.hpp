// Collapsed column moves: for each factor dimension k, redraw the items'
// column k with the users' column k integrated out, then the users' column k
// exactly given it. Called by model/fit/gibbs_sweep.cpp before tau; the
// method is elliptical slice sampling (Murray, Adams & MacKay 2010) inside a
// partially collapsed Gibbs step (van Dyk & Park 2008).
#pragma once
#include <cstdint>

#include "model/fit/gibbs_sweep.hpp"

namespace credence {

// For each k in 0..rank-1: one elliptical slice step on the item column
// V[:, k] under its conditional prior given the item's other coordinates
// (from item_mu, item_lambda) and the likelihood with U[:, k] integrated out
// against its conditional prior given the user's other coordinates; then
// U[:, k] drawn from its exact Gaussian conditional. Leaves p(U, V | the
// rest) invariant. Updates st.sse to the new state's training error.
// Streams keyed (seed, chain, sweep, StreamBlock::column_moves, k).
void apply_column_moves(const GibbsData& data, const FitOptions& options, const SweepKey& key, GibbsState& st);

}  // namespace credence
