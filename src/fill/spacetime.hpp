// The spacetime method: a pixel's own seasonal climatology plus an anomaly that is smooth in
// space and time, both estimated on the whole block, then refined by neighbour analogues.
//
// [G10] Garcia, D. (2010), Robust smoothing of gridded data in one and higher dimensions with
//       missing values, Comput. Stat. Data Anal. 54:1167-1178.
// [W12] Wang, G., Garcia, D., Liu, Y., de Jeu, R. & Dolman, A.J. (2012), A three-dimensional
//       gap filling method for large geophysical datasets, Environ. Model. Softw. 30:139-142
//       (from memory).
// [M83] Morris, C.N. (1983), Parametric empirical Bayes inference: theory and applications,
//       J. Am. Stat. Assoc. 78:47-55 (shrinking group means by the ratio of within- to
//       between-group variance; method-of-moments estimates, from memory).
// [HM07] Holland, P.W. & Welsch, R.E. (1977), Robust regression using iteratively reweighted
//       least-squares, Commun. Stat. Theory Methods 6:813-827 (bisquare weights, c = 4.685).
//
// Model, for pixel p and slot t of the regular time grid (season bin b(t) = day of year in
// bins of max(step, 8) days):
//
//   y(p, t) = C(p, b(t)) + A(p, t) + e(p, t)
//   C(p, b) = S(p, b) + d(p) + f(p, b)
//
// S is a climatology smooth in space and across bins: the penalised least squares fit (dct_pls.hpp,
// the DCT-PLS of [G10] with separate smoothing for space and season) of each pixel's mean per
// bin, weighted by the number of observations. Where a pixel or a bin is unobserved, S comes
// from its neighbours. d is the pixel's own level and f its own seasonal deviation, both
// shrunk toward 0 by k = sigma_within^2 / sigma_between^2 [M83]: d(p) = sum r / (n_p + k) over
// the pixel's residuals r = y - A - S, f(p, b) the same over a kernel of neighbouring bins
// (weights 1, 1/2, 1/4; common practice). Pixels observed often keep their own climatology;
// pixels seldom or never observed take their neighbours'.
// A is the anomaly y - C, smoothed by DCT-PLS on the (row, column, time) block with zero weight
// where nothing was observed [G10, W12]: it carries this year's departures (a late spring, a
// drought) from observed neighbours in space and time into the gaps. S, d, f and A are
// estimated by backfitting (two rounds: A = 0, then A from the first round). With --robust,
// bisquare weights [HM07] on the residuals y - C - A, scale 1.4826 MAD, down-weight outliers;
// a weight of 0 marks an observation rejected.
//
// Standard error (an approximation, not a posterior; calibration is reported by `kalends
// validate`): sd^2 = sigma_e^2 + sigma_between^2 k / (n_p + k) + sigma_A^2 (1 - h(p, t)), with
// sigma_e^2 the weighted residual variance, sigma_A^2 the anomaly variance beyond the noise,
// and h in [0, 1] the weights smoothed by the PLS filter 1 / (1 + p) (1 at an observed cell
// surrounded by observations, 0 far from any).
//
// The model is then refined locally (analogue.hpp): gaps of observed pixels take neighbour
// analogues, blended 0.7 / 0.3 with the model (the share chosen on transplanted masks, not on
// the files accuracy is claimed on); pixels never observed take the normalised convolution of
// the completed field; cells neither stage reaches keep the model. The sd of an analogue value
// is 0.7 x the analogues' variance + 0.3 x the model's; that of a convolved value at least
// 2 gamma(d), the observations' semivariogram at its distance to the nearest known cell.
//
// Pixels with no observation within `halo` pixels on any date are not filled (flag 3). The
// engine hands the method one output tile at a time with that halo, so the seams between tiles
// stay within the solver's tolerance (tested against blocks cut elsewhere).
#pragma once

#include <memory>

#include "fill/dct_pls.hpp"
#include "kalends/fill_method.hpp"

namespace kalends {

class SpacetimeMethod final : public FillMethod {
 public:
  explicit SpacetimeMethod(const MethodOptions& options);
  std::string name() const override { return "spacetime"; }
  MethodParameters parameters() const override;
  int halo() const override { return options_.spacetime_halo; }
  std::size_t scratch_bytes_per_pixel(const TimeGrid& grid) const override;
  void fill(const BlockInput& in, BlockOutput& out) const override;

  /// Season bins of the grid's slots; returns the number of bins.
  static int season_bins(const TimeGrid& grid, std::vector<int>& bin_of_slot);
  /// Width of a season bin: the grid step, at least 8 days.
  static double season_bin_days(const TimeGrid& grid);
  const detail::DctPlanCache& plans() const { return plans_; }

 private:
  MethodOptions options_;
  detail::DctPlanCache plans_;
};

std::unique_ptr<FillMethod> make_spacetime(const MethodOptions& options);

}  // namespace kalends
