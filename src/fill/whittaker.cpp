#include "fill/whittaker.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <limits>

#include "fill/banded_kernels.hpp"
#include "fill/difference_noise.hpp"
#include "fill/gap_limit.hpp"
#include "fill/robust_weights.hpp"
#include "io/json_text.hpp"
#include "kalends/error.hpp"

namespace kalends {

namespace {

std::string number(double v) { return detail::shortest_number(v); }

// An observation whose final robustness weight is below this is reported as rejected.
constexpr double rejection_weight = 0.5;
constexpr double largest_lambda = 1e10;   // the messages below say so
constexpr double smallest_lambda = 1e-6;  // likewise

}  // namespace

double WhittakerMethod::noise_for_sd(const SeriesFit& fit, std::span<const float> y,
                                     std::span<const double> weight) {
  // RSS / (m - tr H) collapses when GCV picks a nearly interpolating curve: on the Alaska NDVI
  // stack it does for most pixels (median m - tr H about 0.5), and a pixel with 3 observations
  // on a line gets sigma near 0. The difference-based estimate does not depend on the fit.
  const auto differences = detail::difference_noise(y, weight);
  const double sigma = std::fmax(fit.sigma, std::sqrt(differences.variance));  // NaN-ignoring
  // A variance estimated from nu terms: scale by the sd of Student's t with nu degrees of
  // freedom, sqrt(nu / (nu - 2)); with nu <= 2 that sd is infinite and no sd is given.
  const double nu = differences.terms;
  return nu > 2 ? sigma * std::sqrt(nu / (nu - 2)) : NAN;
}

WhittakerMethod::WhittakerMethod(const MethodOptions& options) : options_(options) {
  if (options.order < 1 || options.order > 3)
    throw UsageError("--order", "difference order must be 1, 2 or 3");
  // Above about 1e10 the penalised system loses more than 1e-5 of the weights' scale to
  // rounding in double precision (eps * lambda * |D'D|, |D'D| <= 4^order): a lambda of 1e16 had
  // crashed and one of 1e25 filled every gap with about 0.
  // Below about 1e-6 the curve only interpolates, as at 1e-6, while a gap's variance grows as
  // 1 / lambda: 1e-100 had overflowed the sd of plain NDVI and stopped the whole fill.
  if (options.lambda && !(*options.lambda >= smallest_lambda && *options.lambda <= largest_lambda))
    throw UsageError("--lambda", "must be between 1e-6 and 1e10, or 'auto'");
  if (!(options.lambda_min >= smallest_lambda) || !(options.lambda_max >= options.lambda_min) ||
      !(options.lambda_max <= largest_lambda))
    throw UsageError("--lambda-range", "needs 1e-6 <= min <= max <= 1e10");
  if (options.iterations < 0 || options.iterations > 50)
    throw UsageError("--iterations", "must be 0..50");
}

MethodParameters WhittakerMethod::parameters() const {
  MethodParameters p;
  p["lambda"] = options_.lambda ? number(*options_.lambda) : "auto";
  if (!options_.lambda)
    p["lambda_range"] = number(options_.lambda_min) + "," + number(options_.lambda_max);
  p["order"] = std::to_string(options_.order);
  p["envelope"] = options_.envelope_upper ? "upper" : "none";
  p["robust"] = options_.robust ? "yes" : "no";
  if (options_.envelope_upper || options_.robust) p["iterations"] = std::to_string(options_.iterations);
  p["max_gap_days"] = number(options_.max_gap_days);
  p["max_extrapolation_days"] = number(options_.max_extrapolation_days);
  return p;
}

template <int B>
WhittakerMethod::SeriesFit WhittakerMethod::smooth_banded(std::span<const float> y,
                                                          std::span<const float> w,
                                                          std::span<float> fitted,
                                                          std::span<float> sd,
                                                          std::span<std::uint8_t> rejected,
                                                          Workspace& ws) const {
  const int n = int(y.size());
  SeriesFit fit;
  if (ws.n != n) {
    ws.penalty = difference_penalty(n, B);
    ws.system.resize(n, B);
    for (auto* v : {&ws.weight, &ws.base_weight, &ws.robust, &ws.rhs, &ws.z, &ws.residual,
                    &ws.leverage, &ws.scratch})
      v->assign(n, 0.0);
    ws.observed.assign(n, 0.0f);
    ws.n = n;
  }
  int m = 0;
  for (int i = 0; i < n; ++i) {
    const bool ok = w[i] > 0 && std::isfinite(y[i]);
    ws.base_weight[i] = ok ? w[i] : 0.0;
    ws.observed[i] = ok ? 1.0f : 0.0f;
    m += ok;
  }
  std::fill(rejected.begin(), rejected.end(), 0);
  fit.observations = m;
  // With m <= d the curve is an interpolating polynomial with nothing left to estimate noise.
  if (m < B + 1) {
    std::fill(fitted.begin(), fitted.end(), NAN);
    std::fill(sd.begin(), sd.end(), NAN);
    return fit;
  }
  std::copy(ws.base_weight.begin(), ws.base_weight.end(), ws.weight.begin());

  // One penalised solve with the current weights; returns GCV, leaves z and the inverse band.
  bool factored = false;
  auto solve = [&](double lambda) {
    factored = false;
    for (int k = 0; k <= B; ++k)
      for (int i = 0; i < n; ++i) ws.system.at(k, i) = lambda * ws.penalty.at(k, i);
    for (int i = 0; i < n; ++i) {
      ws.system.at(0, i) += ws.weight[i];
      ws.rhs[i] = ws.weight[i] > 0 ? ws.weight[i] * double(y[i]) : 0.0;
    }
    if (!detail::factorize_ldlt<B>(ws.system)) return std::numeric_limits<double>::infinity();
    factored = true;
    std::copy(ws.rhs.begin(), ws.rhs.end(), ws.z.begin());
    detail::solve_ldlt<B>(ws.system, ws.z);
    detail::band_of_inverse<B>(ws.system, ws.inverse);
    double trace = 0, rss = 0;
    int active = 0;
    for (int i = 0; i < n; ++i) {
      if (!(ws.weight[i] > 0)) continue;
      trace += ws.weight[i] * ws.inverse.at(0, i);
      const double r = double(y[i]) - ws.z[i];
      rss += ws.weight[i] * r * r;
      ++active;
    }
    fit.trace = trace;
    fit.lambda = lambda;
    const double dof = active - trace;
    fit.sigma = dof > 1e-9 ? std::sqrt(rss / dof) : NAN;
    fit.gcv = dof > 1e-9 ? active * rss / (dof * dof) : std::numeric_limits<double>::infinity();
    return fit.gcv;
  };

  double lambda;
  if (options_.lambda) {
    lambda = *options_.lambda;
  } else {
    // Coarse log grid in steps of 10^0.5, then the two quarter steps around the best.
    const double lo = std::log10(options_.lambda_min), hi = std::log10(options_.lambda_max);
    double best_log = lo, best = std::numeric_limits<double>::infinity();
    for (double e = lo; e <= hi + 1e-9; e += 0.5) {
      const double g = solve(std::pow(10.0, e));
      if (g < best) best = g, best_log = e;
    }
    for (const double e : {best_log - 0.25, best_log + 0.25}) {
      if (e < lo - 1e-9 || e > hi + 1e-9) continue;
      const double g = solve(std::pow(10.0, e));
      if (g < best) best = g, best_log = e;
    }
    lambda = std::pow(10.0, best_log);
  }
  // Not positive definite in double precision: no curve rather than garbage.
  auto singular = [&] {
    std::fill(fitted.begin(), fitted.end(), NAN);
    std::fill(sd.begin(), sd.end(), NAN);
    fit.singular = true;
    return fit;
  };
  solve(lambda);
  if (!factored) return singular();

  const bool reweight = options_.robust || options_.envelope_upper;
  if (reweight) {
    std::fill(ws.robust.begin(), ws.robust.end(), 1.0);
    for (int it = 0; it < options_.iterations; ++it) {
      for (int i = 0; i < n; ++i) {
        ws.residual[i] = ws.observed[i] > 0 ? double(y[i]) - ws.z[i] : 0.0;
        ws.leverage[i] = ws.weight[i] * ws.inverse.at(0, i);
      }
      const bool below_only = options_.envelope_upper && !options_.robust;
      if (!detail::bisquare_weights(ws.residual, ws.leverage, ws.observed, below_only,
                                    detail::bisquare_constant, ws.robust, ws.scratch))
        break;
      int kept = 0;
      for (int i = 0; i < n; ++i) {
        ws.weight[i] = ws.base_weight[i] * ws.robust[i];
        kept += ws.weight[i] > 0;
      }
      if (kept < B + 1) {  // too few left to fit: keep the last good fit
        for (int i = 0; i < n; ++i) ws.weight[i] = ws.base_weight[i];
        std::fill(ws.robust.begin(), ws.robust.end(), 1.0);
        solve(lambda);
        break;
      }
      solve(lambda);
    }
    if (!factored) return singular();
    for (int i = 0; i < n; ++i)
      rejected[i] = ws.observed[i] > 0 && ws.robust[i] < rejection_weight ? 1 : 0;
  }

  const double low = options_.clamp_min.value_or(-INFINITY);
  const double high = options_.clamp_max.value_or(INFINITY);
  const double sigma = noise_for_sd(fit, y, ws.weight);
  // Where an observation was used the sd is the curve's. Where none was (a gap, a rejected
  // value) the filled value stands in for an observation, so its variance is the curve's plus
  // the noise of one observation about it, RSS / (m - tr H), as for harmonic regression's
  // prediction interval. The curve's alone read far too small wherever lambda is large (RMS of
  // error / sd 1.9 at --lambda 100 and 3.7 with --lambda-range 1e4,1e6 on transplanted masks of
  // the Alaska NDVI stack; about 1 with the noise). Where m - tr H collapses that estimate is
  // unknown and the curve's sd stands alone.
  const double noise = std::isfinite(fit.sigma) ? fit.sigma * fit.sigma : 0.0;
  for (int i = 0; i < n; ++i) {
    fitted[i] = float(std::clamp(ws.z[i], low, high));
    const bool stands_in = !(ws.observed[i] > 0) || rejected[i];
    const double curve = sigma * sigma * std::max(0.0, ws.inverse.at(0, i));
    sd[i] = BlockOutput::sd_value(std::sqrt(curve + (stands_in ? noise : 0.0)));
  }
  fit.fitted = true;
  return fit;
}

WhittakerMethod::SeriesFit WhittakerMethod::smooth(std::span<const float> y,
                                                   std::span<const float> w,
                                                   std::span<float> fitted, std::span<float> sd,
                                                   std::span<std::uint8_t> rejected,
                                                   Workspace& ws) const {
  switch (options_.order) {
    case 1: return smooth_banded<1>(y, w, fitted, sd, rejected, ws);
    case 2: return smooth_banded<2>(y, w, fitted, sd, rejected, ws);
    default: return smooth_banded<3>(y, w, fitted, sd, rejected, ws);
  }
}

void WhittakerMethod::fill(const BlockInput& in, BlockOutput& out) const {
  const int n = in.grid->size;
  const std::string too_few = fmt::format("fewer than {} observations for a difference order of {}",
                                          options_.order + 1, options_.order);
  Workspace ws;
  for (std::int64_t core_pixel = 0; core_pixel < in.core.pixels(); ++core_pixel) {
    const std::int64_t read_pixel = in.read_pixel_of(core_pixel);
    const auto [fitted, sd, rejected] = out.series(core_pixel, n);
    const SeriesFit f =
        smooth(in.series(read_pixel), in.series_weights(read_pixel), fitted, sd, rejected, ws);
    if (f.singular) ++out.not_fitted["the smoothing system is singular in double precision"];
    else if (!f.fitted && f.observations > 0) ++out.not_fitted[too_few];
    detail::limit_gaps(*in.grid, in.series_weights(read_pixel), rejected,
                       options_.max_gap_days, options_.max_extrapolation_days, fitted, sd);
  }
}

std::unique_ptr<FillMethod> make_whittaker(const MethodOptions& options) {
  return std::make_unique<WhittakerMethod>(options);
}

}  // namespace kalends
