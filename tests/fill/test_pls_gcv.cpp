// Mechanics of the GCV choice of the DCT-PLS smoothing (fill/pls_gcv.hpp): the probe, the
// stochastic trace against the exact one, and the search.

#include <catch2/catch.hpp>

#include <cmath>
#include <random>
#include <vector>

#include "fill/pls_gcv.hpp"

using namespace kalends::detail;

namespace {

struct Cube {
  Shape3 shape;
  std::vector<double> truth, y, w;
};

// A smooth field in space and time plus Gaussian noise of sd `noise`, `missing` of it dropped.
Cube smooth_cube(Shape3 shape, double noise, double missing, unsigned seed) {
  std::mt19937 rng(seed);
  std::normal_distribution<double> normal(0.0, noise);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  Cube c{shape, {}, {}, {}};
  const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
  c.truth.resize(n), c.y.resize(n), c.w.resize(n);
  for (int r = 0; r < shape[0]; ++r)
    for (int col = 0; col < shape[1]; ++col)
      for (int s = 0; s < shape[2]; ++s) {
        const std::size_t i = (std::size_t(r) * shape[1] + col) * shape[2] + s;
        c.truth[i] = std::sin(0.4 * r) + std::cos(0.3 * col) + std::sin(0.5 * s);
        const bool seen = uniform(rng) >= missing;
        c.w[i] = seen ? 1.0 : 0.0;
        c.y[i] = seen ? c.truth[i] + normal(rng) : 0.0;
      }
  return c;
}

double rms_error(const std::vector<double>& a, const std::vector<double>& b) {
  double s = 0;
  for (std::size_t i = 0; i < a.size(); ++i) s += (a[i] - b[i]) * (a[i] - b[i]);
  return std::sqrt(s / double(a.size()));
}

}  // namespace

TEST_CASE("the trace probe is +-1 on observed cells, 0 elsewhere, and depends on the raster position") {
  const Cube c = smooth_cube({8, 9, 5}, 0.1, 0.4, 1);
  const auto u = trace_probe(c.shape, c.w, 10, 20);
  int plus = 0, minus = 0;
  for (std::size_t i = 0; i < u.size(); ++i) {
    if (c.w[i] > 0) {
      REQUIRE(std::abs(u[i]) == 1.0);
      (u[i] > 0 ? plus : minus)++;
    } else {
      REQUIRE(u[i] == 0.0);
    }
  }
  // Roughly balanced signs (binomial sd about 8 on ~216 cells).
  CHECK(std::abs(plus - minus) < 50);
  // A block starting 2 rows and 3 columns further draws the same sign for the same raster cell.
  const Shape3 inner{4, 4, 5};
  std::vector<double> ones(std::size_t(4) * 4 * 5, 1.0);
  const auto v = trace_probe(inner, ones, 12, 23);
  for (int r = 0; r < 4; ++r)
    for (int col = 0; col < 4; ++col)
      for (int s = 0; s < 5; ++s) {
        const std::size_t outer = (std::size_t(r + 2) * 9 + col + 3) * 5 + s;
        if (c.w[outer] > 0) REQUIRE(v[(std::size_t(r) * 4 + col) * 5 + s] == u[outer]);
      }
}

TEST_CASE("the stochastic trace averages to the exact trace of (W + P)^-1 W") {
  const Cube c = smooth_cube({5, 6, 10}, 0.2, 0.3, 2);
  const std::size_t n = c.y.size();
  DctPlanCache plans;
  PlsWorkspace ws;
  PlsSettings settings{1.0, 0.5, 1e-10, 5000, false};
  // Exact: column i of H is the solve of y = e_i; its i-th entry is H_ii.
  double exact = 0;
  for (std::size_t i = 0; i < n; ++i) {
    if (!(c.w[i] > 0)) continue;
    std::vector<double> e(n, 0.0), z(n, 0.0);
    e[i] = 1.0;
    solve_pls(plans, c.shape, e, c.w, settings, z, ws);
    exact += z[i];
  }
  REQUIRE(exact > 1.0);
  double sum = 0;
  const int probes = 200;
  for (int k = 0; k < probes; ++k) {
    const auto u = trace_probe(c.shape, c.w, 1000 * k, 7);
    std::vector<double> z(n, 0.0), zu(n, 0.0);
    sum += gcv_score(plans, c.shape, c.y, c.w, u, settings, z, zu, ws).trace;
  }
  CHECK(sum / probes == Approx(exact).epsilon(0.03));
}

TEST_CASE("GCV picks a smoothing that recovers the truth better than either extreme") {
  const Cube c = smooth_cube({24, 20, 30}, 0.3, 0.4, 3);
  const std::size_t n = c.y.size();
  DctPlanCache plans;
  PlsWorkspace ws;
  const auto u = trace_probe(c.shape, c.w, 0, 0);
  PlsSettings start{3.0, 0.3, 1e-6, 2000, false};
  const GcvSearch search;
  const GcvChoice choice = choose_smoothing_by_gcv(plans, c.shape, c.y, c.w, u, start, search, ws);
  REQUIRE(!choice.tried.empty());
  for (const GcvScore& s : choice.tried) CHECK(choice.best.gcv <= s.gcv);
  CHECK(int(choice.tried.size()) <= search.max_candidates);
  auto error_with = [&](double s_space, double s_time) {
    PlsSettings settings = start;
    settings.s_space = s_space, settings.s_time = s_time;
    std::vector<double> z(n, 0.0);
    solve_pls(plans, c.shape, c.y, c.w, settings, z, ws);
    return rms_error(z, c.truth);
  };
  const double chosen = error_with(choice.best.s_space, choice.best.s_time);
  CHECK(chosen < error_with(search.min_s, search.min_s));
  CHECK(chosen < error_with(search.max_s, search.max_s));
  // Far better than the noise itself (sd 0.3).
  CHECK(chosen < 0.15);

  SECTION("candidates solved loosely choose as candidates solved to the full tolerance") {
    GcvSearch exact;
    exact.candidate_tolerance_factor = 1;
    const GcvChoice full = choose_smoothing_by_gcv(plans, c.shape, c.y, c.w, u, start, exact, ws);
    CHECK(full.best.s_space == Approx(choice.best.s_space));
    CHECK(full.best.s_time == Approx(choice.best.s_time));
    CHECK(full.best.gcv == Approx(choice.best.gcv).epsilon(1e-3));
  }

  SECTION("a fixed axis stays where it was set") {
    GcvSearch space_only;
    space_only.time_free = false;
    const GcvChoice c2 = choose_smoothing_by_gcv(plans, c.shape, c.y, c.w, u, start, space_only, ws);
    for (const GcvScore& s : c2.tried) CHECK(s.s_time == Approx(0.3));
  }
}
