// Neighbour analogues and normalised convolution: the two local stages of the spacetime method
// (spacetime.hpp), for the gaps its smooth anomaly cannot resolve.
//
// [KW93] Knutsson, H. & Westin, C.-F. (1993), Normalized and differential convolution, Proc.
//       IEEE CVPR, 515-523 (convolve the values times a certainty, divide by the convolved
//       certainty; pages from memory).
// [M63] Matheron, G. (1963), Principles of geostatistics, Economic Geology 58:1246-1266 (the
//       semivariogram; pages from memory).
// [B86] Borgefors, G. (1986), Distance transformations in digital images, Comput. Vision Graph.
//       Image Process. 34:344-371 (the two-pass chamfer transform; pages from memory).
//
// Analogues (learning each pixel's relation to its neighbours from the dates on which both were
// observed; common practice, no single source). NDVI changes sharply from one pixel to the next, but the difference between two
// neighbouring pixels is steady through a season. So a gap at pixel p, date t, is predicted from
// each neighbour q (within `radius` pixels) that has a value at t:
//
//   y(p, t) ~ y(q, t) + D(p, q, t),   D = sum_s k(s, t) (y(p, s) - y(q, s)) / sum_s k(s, t)
//
// over the dates s on which both were observed, with k a Gaussian in day-of-year distance
// (sd `season_days`, the year wraps around). Its error variance is the spread of the differences,
// shrunk toward a prior (the pair's spread over all dates, two pseudo-dates), times (1 + 1/n_eff),
// n_eff = (sum k)^2 / sum k^2 (the variance of a new difference around an estimated mean).
// Predictions from all neighbours are combined by inverse variance. Rounds grow the filled area
// like rings: round r also uses round r-1's predictions as y(q, t), adding their variance (the
// variance each reports, below).
// Pixels never observed have no differences to learn from and get no analogue.
//
// Normalised convolution [KW93] fills what is left, date by date: the Gaussian-weighted mean of
// the known values around a cell, at the smallest sd of `scales` with enough known neighbours.
#pragma once

#include <cstdint>
#include <span>
#include <vector>

namespace kalends::detail {

struct AnalogueSettings {
  int radius = 6;             // neighbours in a (2 radius + 1)^2 window
  double season_days = 20;    // sd of the day-of-year kernel
  int rounds = 8;             // rings of predictions built on predictions
  double min_pairs = 2;       // least effective number of co-observed dates for a pair
  double min_pairs_in_all = 3;  // least co-observed dates (weights summed) for a pair at all
};

/// A block's cells, pixel-major with the slot fastest: cell = (row * cols + col) * slots + slot.
struct CellGrid {
  int rows = 0, cols = 0, slots = 0;
  std::span<const int> bin_of_slot;  // day-of-year bin of each slot
  int bins = 1;
  double bin_days = 8;
};

/// Predicts unobserved cells (weight 0) from neighbour analogues. On return `estimate` holds
/// the prediction or NaN, `variance` its error variance (the mean of the combined predictions'
/// variances: they share p's own errors, so they are not independent).
void predict_by_analogues(const CellGrid& grid, std::span<const double> y,
                          std::span<const double> weight, const AnalogueSettings& settings,
                          std::vector<double>& estimate, std::vector<double>& variance);

/// Fills the cells of `field` (NaN = unknown) that `wanted` marks, date by date, by normalised
/// convolution with the Gaussian sds of `scales` (pixels, smallest first). A scale is used where
/// the kernel weight on known cells is at least `min_support` (of 1); the largest scale takes
/// any support. Cells no scale reaches stay NaN.
void fill_by_normalised_convolution(const CellGrid& grid, std::vector<double>& field,
                                    std::span<const std::uint8_t> wanted,
                                    std::span<const double> scales, double min_support);

/// Two-pass chamfer distance transform of one rows x cols plane (weights 1 and sqrt 2; [B86]):
/// `distance` to the nearest `known` pixel (infinite where none), and `carried` replaced by the
/// value it has at that pixel (read only where `known`; NaN where none).
void carry_nearest(int rows, int cols, std::span<const std::uint8_t> known,
                   std::vector<double>& distance, std::vector<double>& carried);

/// For each `wanted` cell with a value in `field`: 2 gamma(h) + v, gamma the semivariogram of
/// the observations (pooled over the block's dates, along rows and columns), h the distance, in
/// pixels, from the cell to the nearest cell of the same date that was known before the
/// convolution (observed, or a value the convolution did not make) and v that cell's own
/// `known_variance` (0 for an observation): a copy of an estimate carries its error too. NaN
/// elsewhere.
/// [M63]: gamma(h) = E[(Z(x + h) - Z(x))^2] / 2, so
/// 2 gamma(h) is the mean square error of taking the value of a cell h away. The convolution
/// averages several such cells, which would lower it toward gamma(h); on transplanted masks with
/// holes (never the masked files) gamma(h) gave too small an sd and 2 gamma(h) about the right
/// one (RMS of error / sd 0.87 and 1.16 on two mask sets, against 1.08 and 1.41 before).
std::vector<double> interpolation_variance(const CellGrid& grid, std::span<const double> y,
                                           std::span<const double> weight,
                                           std::span<const std::uint8_t> wanted,
                                           std::span<const double> field,
                                           std::span<const double> known_variance);

}  // namespace kalends::detail
