// The weighted Whittaker smoother.
//
// [E03] Eilers, P.H.C. (2003), A perfect smoother, Anal. Chem. 75:3631-3636.
// [HdH85] Hutchinson, M.F. & de Hoog, F.R. (1985), Smoothing noisy data with spline functions,
//         Numer. Math. 47:99-106.
// [CW79] Craven, P. & Wahba, G. (1979), Smoothing noisy data with spline functions,
//        Numer. Math. 31:377-403.
// [W83] Wahba, G. (1983), Bayesian "confidence intervals" for the cross-validated smoothing
//       spline, J. R. Stat. Soc. B 45:133-150.
// [G10] Garcia, D. (2010), Robust smoothing of gridded data in one and higher dimensions with
//       missing values, Comput. Stat. Data Anal. 54:1167-1178.
//
// On the regular time grid z minimises  sum_i w_i (y_i - z_i)^2 + lambda sum_i (Delta^d z)_i^2
// [E03], i.e. solves (W + lambda D_d^T D_d) z = W y, a band system of half-bandwidth d solved by
// LDL^T in O(n). With lambda chosen automatically, each pixel takes the lambda of a log grid
// that minimises GCV(lambda) = m RSS / (m - tr H)^2 [CW79], m the number of observations, the
// trace of H = (W + lambda P)^-1 W taken from the band of the inverse [HdH85]. The standard
// error of z_i is sigma sqrt((W + lambda P)^-1_ii), the Bayesian posterior sd of [W83], with
// sigma^2 = RSS / (m - tr H), floored by the difference-based variance of Gasser, Sroka &
// Jennen-Steinmetz (1986, Biometrika 73:625-633) and scaled by the sd of Student's t with
// m - 2 degrees of freedom (no sd with fewer than 5 observations).
#pragma once

#include <memory>
#include <span>
#include <vector>

#include "kalends/banded.hpp"
#include "kalends/fill_method.hpp"

namespace kalends {

class WhittakerMethod final : public FillMethod {
 public:
  explicit WhittakerMethod(const MethodOptions& options);
  std::string name() const override { return "whittaker"; }
  MethodParameters parameters() const override;
  std::size_t scratch_bytes_per_pixel(const TimeGrid&) const override { return 0; }
  void fill(const BlockInput& in, BlockOutput& out) const override;

  struct Workspace {
    SymmetricBand penalty, system, inverse;
    std::vector<double> weight, base_weight, robust, rhs, z, residual, leverage, scratch;
    std::vector<float> observed;
    int n = -1;
  };
  struct SeriesFit {
    double lambda = 0, trace = 0, gcv = 0, sigma = 0;
    int observations = 0;
    bool fitted = false;
    bool singular = false;  // enough observations, but the system did not factorise
  };
  /// Smooths one series (NaN or zero weight = missing). `fitted`, `sd`, `rejected` have the
  /// series' length.
  SeriesFit smooth(std::span<const float> y, std::span<const float> w, std::span<float> fitted,
                   std::span<float> sd, std::span<std::uint8_t> rejected, Workspace& ws) const;

 private:
  template <int B>
  SeriesFit smooth_banded(std::span<const float> y, std::span<const float> w,
                          std::span<float> fitted, std::span<float> sd,
                          std::span<std::uint8_t> rejected, Workspace& ws) const;
  // The sigma of the sd: see the header comment.
  static double noise_for_sd(const SeriesFit& fit, std::span<const float> y,
                             std::span<const double> weight);
  MethodOptions options_;
};

std::unique_ptr<FillMethod> make_whittaker(const MethodOptions& options);

}  // namespace kalends
