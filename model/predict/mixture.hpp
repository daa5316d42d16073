// The posterior predictive mixture of one rating: the equal-weight mixture
// over kept samples s of Normal(m[s], 1/tau[s]). Used by the prediction
// engine, population answers, evaluation, comparison and the report; the
// visitor fold-in (model/predict/foldin.hpp) passes per-component precisions
// in double. Quantiles are exact (a Cornish-Fisher start, then bracket and
// Halley/Newton/bisection; see mixture.cpp).
#pragma once
#include <span>

namespace credence {

// Mixture helpers over per-sample means m[s] and noise precisions tau[s].
// All need m.size() == tau.size() > 0 (mixture_mean: m non-empty), and
// mixture_quantile needs 0 < p < 1. They throw std::invalid_argument
// otherwise: callers pass a posterior's samples and probabilities built from
// a level already checked (PredictionEngine, evaluate), so a failure is a bug.
double mixture_mean(std::span<const double> m);
double mixture_sd(std::span<const double> m, std::span<const float> tau);
double mixture_cdf(std::span<const double> m, std::span<const float> tau, double x);
double mixture_quantile(std::span<const double> m, std::span<const float> tau, double p);
double mixture_log_density(std::span<const double> m, std::span<const float> tau, double x);

// The same for components whose precisions are doubles (each component's
// own 1 / variance, e.g. 1 / (parameter variance + noise variance)); the
// same requirements and throws.
double mixture_sd(std::span<const double> m, std::span<const double> precision);
double mixture_cdf(std::span<const double> m, std::span<const double> precision, double x);
double mixture_quantile(std::span<const double> m, std::span<const double> precision, double p);

}  // namespace credence
