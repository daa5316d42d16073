// Population-level predictions for ids the model has not seen. Used by the
// server's POST /v1/predictions when a client asks for "fallback":
// "population"; anything offline may call it the same way.
// Model: BPMF (Salakhutdinov & Mnih 2008), whose hyperparameter prior gives
// an unseen user's (item's) factor and bias under each kept sample.
//
// Under kept sample s an unseen user's factor is a draw from Normal(mu_U,
// Lambda_U^-1) and its bias from Normal(0, 1/lambda_b) (likewise for items).
// Rather than drawing, each sample's predictive is integrated exactly when
// one side is known: the rating is then Normal with mean g + b + c + mu.v and
// variance 1/tau + v' Lambda^-1 v + 1/lambda. With both sides unseen the
// product of two Gaussian factors is not Gaussian; we use the Normal with the
// same mean and variance (moment matching). The answer is the equal-weight
// mixture of these per-sample Normals, summarised like PredictionEngine does
// (mixture mean and sd, mixture quantiles, mean and bounds clipped to the scale).
#pragma once
#include <cstdint>
#include <optional>

#include "model/posterior/posterior.hpp"
#include "model/predict/item_statistics.hpp"
#include "model/predict/predict.hpp"

namespace credence {

// Needs a validated posterior, `covariances` computed from it
// (hyperparameter_covariances() or ItemStatistics::covariances), and level
// in (0, 1). `user` / `item`: the known index (must be valid), or nullopt for
// an unseen id; with both known the answer is the model's own per-sample
// mixture, consistent with the rest. Returns the summarised mixture.
// Throws std::invalid_argument when the covariances have another shape than
// the posterior, or level is outside (0, 1); std::out_of_range for an index
// out of range. Callers check user input before calling.
Prediction population_prediction(const Posterior& posterior, const HyperparameterCovariances& covariances,
                                 std::optional<uint32_t> user, std::optional<uint32_t> item, double level);

}  // namespace credence
