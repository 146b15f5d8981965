#include "fill/robust_weights.hpp"

#include <algorithm>
#include <cmath>

namespace kalends::detail {

bool bisquare_weights(std::span<const double> residual, std::span<const double> leverage,
                      std::span<const float> observed, bool below_only, double c,
                      std::span<double> weight, std::span<double> scratch) {
  std::size_t m = 0;
  // The scale comes from the studentised residuals r_i / sqrt(1 - h_ii): raw residuals of a
  // flexible fit are shrunk by (1 - h_ii) and would make every value look like an outlier.
  auto studentised = [&](std::size_t i) {
    return residual[i] / std::sqrt(1.0 - std::min(leverage[i], 0.999));
  };
  for (std::size_t i = 0; i < residual.size(); ++i)
    if (observed[i] > 0) scratch[m++] = std::abs(studentised(i));
  std::fill(weight.begin(), weight.end(), 1.0);
  if (m == 0) return false;
  // MAD about zero: residuals of a fit are already centred (Garcia 2010 uses the same).
  std::nth_element(scratch.begin(), scratch.begin() + m / 2, scratch.begin() + m);
  const double mad = scratch[m / 2];
  const double s = 1.4826 * mad;
  if (!(s > 0)) return false;
  for (std::size_t i = 0; i < residual.size(); ++i) {
    if (!(observed[i] > 0)) continue;
    if (below_only && residual[i] >= 0) continue;
    const double u = studentised(i) / (c * s);
    weight[i] = std::abs(u) < 1 ? (1 - u * u) * (1 - u * u) : 0.0;
  }
  return true;
}

}  // namespace kalends::detail
