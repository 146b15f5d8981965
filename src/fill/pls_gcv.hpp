// Choosing the two smoothing parameters of the DCT-PLS (dct_pls.hpp) by generalised
// cross-validation.
//
// [CW79] Craven, P. & Wahba, G. (1979), Smoothing noisy data with spline functions, Numer. Math.
//        31:377-403: GCV(s) = m RSS(s) / (m - tr H(s))^2, m the number of observations.
// [H89]  Hutchinson, M.F. (1989), A stochastic estimator of the trace of the influence matrix
//        for Laplacian smoothing splines, Commun. Stat. Simul. Comput. 18:1059-1076:
//        tr M = E[u^T M u] for u with independent +-1 entries.
// [G10]  Garcia, D. (2010), Comput. Stat. Data Anal. 54:1167-1178, chooses its one smoothing by
//        GCV with the trace of the fully observed problem, sum 1 / (1 + p); with most cells
//        missing (winters, clouds) that trace is far from the true one, so we estimate it.
//
// Here H = (W + P)^-1 W, RSS = sum w (y - z)^2 over the observed cells and m their number (as
// the Whittaker method's GCV). tr H is estimated by [H89] with one probe u, +-1 on observed cells
// and 0 elsewhere (H's diagonal is 0 where w = 0, so the expectation is exact): u^T z_u with
// z_u = (W + P)^-1 W u, one more solve per candidate. For n observed cells the estimate's sd is
// at most sqrt(2 tr H), under 1 % of it once tr H exceeds 20 000 (a 100 x 100 x 48 block with
// tr H of a few thousand: a few %). The same u serves every candidate, so the GCV curve is
// smooth in s and its minimum well defined. u is drawn from a hash of each cell's position in
// the raster, not in the block, so overlapping blocks draw the same signs.
//
// The search works on log10 s, from the start values: at each step it tries one step up and
// one step down along each free axis and moves to the best point that lowers GCV; when none
// does, it halves the step, down to `finest_step`. Bounds keep s in [min_s, max_s].
#pragma once

#include <cstdint>
#include <span>
#include <vector>

#include "fill/dct_pls.hpp"

namespace kalends::detail {

struct GcvSearch {
  bool space_free = true, time_free = true;
  double first_step = 0.5;   // decades
  double finest_step = 0.25;
  double min_s = 1e-3, max_s = 1e4;
  int max_candidates = 24;
  // Candidates are solved to this many times the final tolerance: neighbouring candidates'
  // GCV differ by far more than such a solve's error (at 10x, 2.0-2.7x faster on Alaska; the
  // same choice on five of six development sets, a quarter decade apart where GCV is flat on
  // the sixth). The chosen s is then solved at the full tolerance by the caller.
  double candidate_tolerance_factor = 10;
};

struct GcvScore {
  double s_space = 0, s_time = 0;
  double gcv = 0, rss = 0, trace = 0;
  double observed = 0;  // m
};

struct GcvChoice {
  GcvScore best;
  std::vector<GcvScore> tried;  // in the order evaluated
};

/// A +-1 probe on the cells with w > 0, 0 elsewhere, from a hash of (row0 + row, col0 + col,
/// slot): the block's offset in the raster makes overlapping blocks agree.
std::vector<double> trace_probe(const Shape3& shape, std::span<const double> w, std::int64_t row0,
                                std::int64_t col0);

/// GCV of the solve with `settings` (its s_space and s_time). `z` and `z_probe` are the start
/// values on entry (zeros are fine) and the solutions on return.
GcvScore gcv_score(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                   std::span<const double> w, std::span<const double> probe,
                   const PlsSettings& settings, std::span<double> z, std::span<double> z_probe,
                   PlsWorkspace& ws);

/// Searches s_space and s_time (the free ones) from `start` for the least GCV.
GcvChoice choose_smoothing_by_gcv(const DctPlanCache& plans, const Shape3& shape,
                                  std::span<const double> y, std::span<const double> w,
                                  std::span<const double> probe, const PlsSettings& start,
                                  const GcvSearch& search, PlsWorkspace& ws);

}  // namespace kalends::detail
