// The human-readable summary of a posterior behind `credence inspect`: shape,
// samples, chains, scale, fit metadata highlights, the convergence verdict
// and the file size. Reads only what Posterior holds (model/posterior/posterior.hpp).
#pragma once
#include <string>

#include "model/posterior/posterior.hpp"

namespace credence {

// A short human-readable summary (for `credence inspect`): shape, samples,
// chains, scale, fit metadata highlights, diagnostics verdict, file size.
std::string describe_posterior(const Posterior& posterior, const std::string& path);

}  // namespace credence
