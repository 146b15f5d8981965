#include "fill/pls_gcv.hpp"

#include <algorithm>
#include <cmath>
#include <limits>
#include <map>

namespace kalends::detail {

namespace {

// SplitMix64 (Steele, Lea & Flood 2014, OOPSLA): a well-mixed 64-bit hash of the cell position.
std::uint64_t mix(std::uint64_t x) {
  x += 0x9e3779b97f4a7c15ULL;
  x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9ULL;
  x = (x ^ (x >> 27)) * 0x94d049bb133111ebULL;
  return x ^ (x >> 31);
}

}  // namespace

std::vector<double> trace_probe(const Shape3& shape, std::span<const double> w, std::int64_t row0,
                                std::int64_t col0) {
  const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
  std::vector<double> u(n, 0.0);
  for (int r = 0; r < shape[0]; ++r)
    for (int c = 0; c < shape[1]; ++c)
      for (int s = 0; s < shape[2]; ++s) {
        const std::size_t i = (std::size_t(r) * shape[1] + c) * shape[2] + s;
        if (!(w[i] > 0)) continue;
        const std::uint64_t key = mix(mix(std::uint64_t(row0 + r)) ^ std::uint64_t(col0 + c)) ^
                                  std::uint64_t(s) * 0x2545f4914f6cdd1dULL;
        u[i] = (mix(key) >> 63) ? 1.0 : -1.0;
      }
  return u;
}

GcvScore gcv_score(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                   std::span<const double> w, std::span<const double> probe,
                   const PlsSettings& settings, std::span<double> z, std::span<double> z_probe,
                   PlsWorkspace& ws) {
  solve_pls(plans, shape, y, w, settings, z, ws);
  solve_pls(plans, shape, probe, w, settings, z_probe, ws);
  GcvScore score;
  score.s_space = settings.s_space;
  score.s_time = settings.s_time;
  for (std::size_t i = 0; i < z.size(); ++i) {
    if (!(w[i] > 0)) continue;
    const double r = y[i] - z[i];
    score.rss += w[i] * r * r;
    score.trace += probe[i] * z_probe[i];
    score.observed += 1;
  }
  const double dof = score.observed - score.trace;
  score.gcv = dof > 1e-9 ? score.observed * score.rss / (dof * dof)
                         : std::numeric_limits<double>::infinity();
  return score;
}

GcvChoice choose_smoothing_by_gcv(const DctPlanCache& plans, const Shape3& shape,
                                  std::span<const double> y, std::span<const double> w,
                                  std::span<const double> probe, const PlsSettings& start,
                                  const GcvSearch& search, PlsWorkspace& ws) {
  GcvChoice choice;
  std::vector<double> z(y.size(), 0.0), z_probe(y.size(), 0.0);
  const double lo = std::log10(search.min_s), hi = std::log10(search.max_s);
  // Points on a lattice of the finest step, so a point reached twice is scored once.
  auto key = [&](double e) { return std::lround(e / search.finest_step); };
  std::map<std::pair<long, long>, GcvScore> scored;
  auto score_at = [&](double e_space, double e_time) -> const GcvScore& {
    const auto k = std::make_pair(key(e_space), key(e_time));
    if (const auto it = scored.find(k); it != scored.end()) return it->second;
    PlsSettings settings = start;
    settings.tolerance = std::min(0.1, start.tolerance * search.candidate_tolerance_factor);
    settings.s_space = std::pow(10.0, e_space);
    settings.s_time = std::pow(10.0, e_time);
    // Each solve starts from the last one's solution: the candidates are neighbours.
    const GcvScore s = gcv_score(plans, shape, y, w, probe, settings, z, z_probe, ws);
    choice.tried.push_back(s);
    return scored.emplace(k, s).first->second;
  };
  double e_space = std::clamp(std::log10(start.s_space), lo, hi);
  double e_time = std::clamp(std::log10(start.s_time), lo, hi);
  GcvScore best = score_at(e_space, e_time);
  double step = search.first_step;
  while (int(choice.tried.size()) < search.max_candidates) {
    double next_space = e_space, next_time = e_time;
    bool moved = false;
    for (int axis = 0; axis < 2; ++axis) {
      if (axis == 0 ? !search.space_free : !search.time_free) continue;
      for (double direction : {-1.0, 1.0}) {
        const double es = axis == 0 ? std::clamp(e_space + direction * step, lo, hi) : e_space;
        const double et = axis == 1 ? std::clamp(e_time + direction * step, lo, hi) : e_time;
        if (es == e_space && et == e_time) continue;
        const GcvScore& s = score_at(es, et);
        if (s.gcv < best.gcv) {
          best = s;
          next_space = es, next_time = et;
          moved = true;
        }
      }
    }
    if (moved) {
      e_space = next_space, e_time = next_time;
    } else if (step > search.finest_step * 1.0001) {
      step = std::max(search.finest_step, step / 2);
    } else {
      break;
    }
  }
  choice.best = best;
  return choice;
}

}  // namespace kalends::detail
