// Noise variance of a series from its observations alone, without a fitted curve.
//
// Gasser, T., Sroka, L. & Jennen-Steinmetz, C. (1986), Residual variance and residual pattern
// in nonlinear regression, Biometrika 73:625-633 (equations from memory). Each interior
// observation is compared with the straight line through its two neighbours (unequal spacing
// allowed):
//
//   e_i = a_i y_{i-1} + b_i y_{i+1} - y_i,   a_i = (x_{i+1} - x_i) / (x_{i+1} - x_{i-1}),
//   b_i = (x_i - x_{i-1}) / (x_{i+1} - x_{i-1}),   sigma^2 = mean_i e_i^2 / (a_i^2 + b_i^2 + 1).
//
// For independent noise of variance sigma^2 on a locally straight signal each term has
// expectation sigma^2; curvature between sparse observations adds to it. A smoother's residual
// variance can collapse to 0 when it interpolates a handful of points; this one cannot.
#pragma once

#include <cmath>
#include <span>

namespace kalends::detail {

// Observations are the finite y with weight > 0; x is the slot index. Returns the variance and
// the number of differences it averages (m - 2); NaN and 0 with fewer than 3 observations.
struct DifferenceNoise {
  double variance = NAN;
  int terms = 0;
};

template <class Weight>
DifferenceNoise difference_noise(std::span<const float> y, std::span<const Weight> w) {
  const int n = int(y.size());
  int previous = -1, current = -1, terms = 0;
  double sum = 0;
  for (int i = 0; i < n; ++i) {
    if (!(w[i] > 0) || !std::isfinite(y[i])) continue;
    if (previous >= 0) {
      const double span = i - previous;
      const double a = (i - current) / span, b = (current - previous) / span;
      const double e = a * y[previous] + b * y[i] - y[current];
      sum += e * e / (a * a + b * b + 1);
      ++terms;
    }
    previous = current;
    current = i;
  }
  return {terms > 0 ? sum / terms : NAN, terms};
}

}  // namespace kalends::detail
