// Population-level predictions for ids the model has not seen, answered only
// when a client asks for them ("fallback": "population").
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

#include "model/predict/predict.hpp"
#include "server/model_slot.hpp"

namespace credence::server {

// `user` / `item`: the known index, or nullopt for an unseen id. level in (0,1).
Prediction population_prediction(const LoadedModel& model, std::optional<uint32_t> user,
                                 std::optional<uint32_t> item, double level);

}  // namespace credence::server
