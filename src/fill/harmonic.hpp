// Harmonic regression: a mean, k harmonics of a one-year period and an optional linear trend,
// fitted by weighted least squares, with iterative rejection of low outliers.
//
//   y(t) = a_0 [+ c (t - t_mean)/365.25] + sum_{j=1..k} a_j cos(2 pi j t / P) + b_j sin(2 pi j t / P),
//   P = 365.25 days, t the true date of each observation.
//
// [R00] Roerink, G.J., Menenti, M. & Verhoef, W. (2000), Reconstructing cloudfree NDVI
//       composites using Fourier analysis of time series, Int. J. Remote Sens. 21:1911-1917:
//       the fit-reject-refit loop that drops observations below the curve (cloud). We reject
//       those more than `reject_below` residual sd under the curve, until none is left. The standard error of the fitted value at t
// is sigma sqrt(x(t)^T (X^T W X)^-1 x(t)), sigma^2 = RSS / (m - p); where no observation was used
// (a gap, a rejected one) the value stands in for one, and its prediction standard error is
// sigma sqrt(1 + x(t)^T (X^T W X)^-1 x(t)) (the textbook prediction interval of least squares).
#pragma once

#include <memory>
#include <span>
#include <vector>

#include "kalends/fill_method.hpp"

namespace kalends {

class HarmonicMethod final : public FillMethod {
 public:
  explicit HarmonicMethod(const MethodOptions& options);
  std::string name() const override { return "harmonic"; }
  MethodParameters parameters() const override;
  void fill(const BlockInput& in, BlockOutput& out) const override;

  int coefficients() const { return 1 + (options_.trend ? 1 : 0) + 2 * options_.harmonics; }
  /// The design matrix rows at times `days` (row-major, days.size() x coefficients()).
  std::vector<double> design(std::span<const double> days) const;
  struct SeriesFit {
    std::vector<double> coefficients;
    double sigma = 0;
    int observations = 0, rejected = 0;
    bool fitted = false;
    bool ill_conditioned = false;  // enough observations, but they do not determine the curve
  };
  /// Fits one series given its design rows; writes the curve and sd at every row.
  SeriesFit fit(std::span<const double> design, std::span<const float> y, std::span<const float> w,
                std::span<float> fitted, std::span<float> sd, std::span<std::uint8_t> rejected) const;

 private:
  MethodOptions options_;
};

std::unique_ptr<FillMethod> make_harmonic(const MethodOptions& options);

}  // namespace kalends
