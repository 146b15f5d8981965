// Tukey's bisquare robustness weights on studentised residuals, as used for robust smoothing
// by Garcia (2010), Comput. Stat. Data Anal. 54:1167, eq. (7)-(8):
//   u_i = r_i / (c * s * sqrt(1 - h_ii)),  W_i = (1 - u_i^2)^2 for |u_i| < 1,
// with the scale s = 1.4826 MAD(r_i / sqrt(1 - h_ii)) taken from the studentised residuals
// (Garcia uses the MAD of the raw residuals; ours stays consistent when h_ii is large).
#pragma once

#include <span>

namespace kalends::detail {

/// Tukey's constant for 95 % efficiency under Gaussian noise (Garcia 2010, after eq. 8).
inline constexpr double bisquare_constant = 4.685;

/// `residual`, `leverage` and `observed` are per slot; only slots with observed[i] > 0 count.
/// With `below_only`, residuals at or above the curve keep weight 1: the fit is drawn toward
/// the upper envelope, since clouds and haze bias vegetation indices low.
/// Returns false (weights left at 1) when the residual scale is zero.
bool bisquare_weights(std::span<const double> residual, std::span<const double> leverage,
                      std::span<const float> observed, bool below_only, double c,
                      std::span<double> weight, std::span<double> scratch);

}  // namespace kalends::detail
