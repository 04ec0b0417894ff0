// Probability aggregation by the tau model (Journel 2002, "Combining knowledge from diverse sources:
// an alternative to traditional data independence hypotheses", Mathematical Geology 34(5); Krishnan
// 2008, "The tau model for data redundancy and information combination in earth sciences",
// Mathematical Geosciences 40). With distances x = (1 - p) / p to the event, the combined distance
// is x / x0 = prod_i (x_i / x0)^tau_i, where x0 is the prior's; tau_i = 1 for every source is the
// permanence of ratios.
#pragma once

#include <cmath>
#include <cstddef>

namespace sl {

// Combines, category by category, the prior p0[k] with sources p[s * K + k] weighted by tau[s],
// then normalises over the K categories into out[k]. A source certain about a category (0 or 1 with
// tau > 0) decides it, the first such source in order winning a conflict; a category whose prior is
// 0 or 1 keeps its prior. If every category ends at 0 the first source is returned.
inline void tau_merge(const double* p0, const double* p, const double* tau, std::size_t sources, std::size_t K,
                      double* out) noexcept {
  double sum = 0;
  for (std::size_t k = 0; k < K; ++k) {
    const double prior = p0[k];
    double post;
    if (!(prior > 0 && prior < 1)) {
      post = prior > 0 ? 1.0 : 0.0;
    } else {
      const double log_x0 = std::log((1 - prior) / prior);
      double log_x = log_x0;
      int certain = -1;  // -1 none, 0 certain no, 1 certain yes
      for (std::size_t s = 0; s < sources && certain < 0; ++s) {
        const double ps = p[s * K + k];
        if (tau[s] == 0) continue;
        if (ps >= 1) {
          certain = 1;
        } else if (ps <= 0) {
          certain = 0;
        } else {
          log_x += tau[s] * (std::log((1 - ps) / ps) - log_x0);
        }
      }
      if (certain >= 0) {
        post = certain;
      } else if (log_x > 700) {
        post = 0;
      } else {
        post = 1.0 / (1.0 + std::exp(log_x));
      }
    }
    out[k] = post;
    sum += post;
  }
  if (sum > 0) {
    for (std::size_t k = 0; k < K; ++k) out[k] /= sum;
  } else {
    for (std::size_t k = 0; k < K; ++k) out[k] = p[k];
  }
}

}  // namespace sl
