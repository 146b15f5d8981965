// Mechanics of the spacetime method's local stages (fill/analogue.hpp), on invented cubes.

#include <catch2/catch.hpp>

#include <cmath>
#include <cstdint>
#include <random>
#include <vector>

#include "fill/analogue.hpp"

using namespace kalends::detail;

namespace {

struct Cube {
  int rows, cols, slots;
  std::vector<int> bins;
  std::vector<double> y, weight;
  std::size_t at(int r, int c, int s) const { return (std::size_t(r) * cols + c) * slots + s; }
  CellGrid grid() const { return {rows, cols, slots, bins, 23, 16.0}; }
};

// y = level(pixel) + season(slot): every pair of pixels differs by a constant, so an analogue
// must give back the withheld value exactly.
Cube offset_cube(int rows, int cols, int years) {
  Cube cube{rows, cols, 8 * years, {}, {}, {}};
  std::mt19937 rng(3);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  std::vector<double> level(std::size_t(rows) * cols), season(cube.slots);
  for (double& l : level) l = uniform(rng);
  for (double& s : season) s = uniform(rng);
  for (int s = 0; s < cube.slots; ++s) cube.bins.push_back(9 + s % 8);  // days 145..257 in 16-day bins
  cube.y.resize(std::size_t(rows) * cols * cube.slots);
  cube.weight.assign(cube.y.size(), 1.0);
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c)
      for (int s = 0; s < cube.slots; ++s) cube.y[cube.at(r, c, s)] = level[std::size_t(r) * cols + c] + season[s];
  return cube;
}

}  // namespace

TEST_CASE("analogues give back a value withheld from pixels with steady differences", "[fill][analogue]") {
  Cube cube = offset_cube(9, 9, 3);
  const std::vector<double> truth = cube.y;
  // A 5 x 5 cloud on slot 10: its centre has no observed neighbour within radius 2 on that date,
  // so it is reached only in a second round, from the first round's predictions.
  for (int r = 2; r <= 6; ++r)
    for (int c = 2; c <= 6; ++c) cube.weight[cube.at(r, c, 10)] = 0.0;
  cube.weight[cube.at(0, 0, 3)] = 0.0;
  AnalogueSettings settings;
  settings.radius = 2;
  std::vector<double> estimate, variance;

  settings.rounds = 1;
  predict_by_analogues(cube.grid(), cube.y, cube.weight, settings, estimate, variance);
  CHECK(std::isnan(estimate[cube.at(4, 4, 10)]));
  CHECK(estimate[cube.at(2, 2, 10)] == Approx(truth[cube.at(2, 2, 10)]).margin(1e-9));

  settings.rounds = 2;
  predict_by_analogues(cube.grid(), cube.y, cube.weight, settings, estimate, variance);
  for (int r = 2; r <= 6; ++r)
    for (int c = 2; c <= 6; ++c) {
      CHECK(estimate[cube.at(r, c, 10)] == Approx(truth[cube.at(r, c, 10)]).margin(1e-9));
      CHECK(variance[cube.at(r, c, 10)] >= 0.0);
    }
  CHECK(estimate[cube.at(0, 0, 3)] == Approx(truth[cube.at(0, 0, 3)]).margin(1e-9));
  // Observed cells are not predicted.
  CHECK(std::isnan(estimate[cube.at(0, 0, 4)]));
}

TEST_CASE("a prediction built on predictions is less certain than one from observed neighbours",
          "[fill][analogue]") {
  // Independent noise on every cell: each analogue then carries both pixels' noise, and a ring
  // prediction also the error of the prediction it builds on (about twice the variance of a
  // direct one). Propagating 1 / sum(1 / v) instead, as if the combined predictions' errors were
  // independent, made it about as certain as a direct one.
  Cube cube = offset_cube(9, 9, 6);
  std::mt19937 rng(11);
  std::normal_distribution<double> noise(0.0, 0.05);
  for (double& v : cube.y) v += noise(rng);
  AnalogueSettings settings;
  settings.radius = 1;
  settings.rounds = 3;
  std::vector<double> estimate, variance;
  // Slot 10: a 5 x 5 cloud, its centre two rings deep. Slot 20: the centre alone missing.
  for (int r = 2; r <= 6; ++r)
    for (int c = 2; c <= 6; ++c) cube.weight[cube.at(r, c, 10)] = 0.0;
  cube.weight[cube.at(4, 4, 20)] = 0.0;
  predict_by_analogues(cube.grid(), cube.y, cube.weight, settings, estimate, variance);
  const double direct = variance[cube.at(4, 4, 20)], ring = variance[cube.at(4, 4, 10)];
  REQUIRE(std::isfinite(direct));
  REQUIRE(std::isfinite(ring));
  CHECK(ring > 1.5 * direct);
}

TEST_CASE("a pixel never observed gets no analogue; normalised convolution fills it", "[fill][analogue]") {
  Cube cube = offset_cube(7, 7, 2);
  for (int s = 0; s < cube.slots; ++s) cube.weight[cube.at(3, 3, s)] = 0.0;
  AnalogueSettings settings;
  settings.radius = 2;
  std::vector<double> estimate, variance;
  predict_by_analogues(cube.grid(), cube.y, cube.weight, settings, estimate, variance);
  for (int s = 0; s < cube.slots; ++s) CHECK(std::isnan(estimate[cube.at(3, 3, s)]));

  // A field linear in the column: a Gaussian mean of a symmetric neighbourhood is its centre.
  std::vector<double> field(cube.y.size());
  std::vector<std::uint8_t> wanted(cube.y.size(), 0);
  for (int r = 0; r < 7; ++r)
    for (int c = 0; c < 7; ++c)
      for (int s = 0; s < cube.slots; ++s) field[cube.at(r, c, s)] = 0.5 + 0.1 * c + 0.01 * s;
  for (int s = 0; s < cube.slots; ++s) {
    field[cube.at(3, 3, s)] = NAN;
    wanted[cube.at(3, 3, s)] = 1;
  }
  const std::vector<double> scales{1.0, 2.0};
  fill_by_normalised_convolution(cube.grid(), field, wanted, scales, 0.05);
  for (int s = 0; s < cube.slots; ++s)
    CHECK(field[cube.at(3, 3, s)] == Approx(0.5 + 0.3 + 0.01 * s).margin(1e-12));
}

TEST_CASE("normalised convolution leaves cells beyond its largest kernel unknown", "[fill][analogue]") {
  const int rows = 1, cols = 40, slots = 1;
  std::vector<int> bins{0};
  const CellGrid grid{rows, cols, slots, bins, 1, 16.0};
  std::vector<double> field(cols, NAN);
  std::vector<std::uint8_t> wanted(cols, 1);
  field[0] = 2.0;
  wanted[0] = 0;
  const std::vector<double> scales{1.0, 2.0};  // 2 sd x 3 = 6 px of reach
  fill_by_normalised_convolution(grid, field, wanted, scales, 0.05);
  for (int c = 1; c <= 6; ++c) CHECK(field[c] == Approx(2.0));
  for (int c = 7; c < cols; ++c) CHECK(std::isnan(field[c]));
}

TEST_CASE("interpolation variance is twice the semivariogram at the distance to known cells, plus their own") {
  // Observations rise linearly along rows (slope a per pixel) and are constant down columns, so
  // the pooled semivariogram is gamma(h) = (a^2 h^2 / 2 + 0) / 2 = a^2 h^2 / 4 (as many pairs
  // along rows as down columns on a square grid with a square hole in its middle).
  const int n = 40, slots = 2, hole0 = 15, hole1 = 25;  // hole rows/cols 15..25
  const double a = 0.01;
  const std::size_t cells = std::size_t(n) * n * slots;
  std::vector<double> y(cells, 0.0), weight(cells, 0.0), field(cells, NAN);
  std::vector<std::uint8_t> wanted(cells, 0);
  std::vector<int> bins(slots, 0);
  for (int r = 0; r < n; ++r)
    for (int c = 0; c < n; ++c)
      for (int s = 0; s < slots; ++s) {
        const std::size_t i = (std::size_t(r) * n + c) * slots + s;
        const bool in_hole = r >= hole0 && r <= hole1 && c >= hole0 && c <= hole1;
        if (in_hole) {
          wanted[i] = 1;
          field[i] = 0.5;  // as if the convolution had filled it
        } else {
          y[i] = a * c;
          weight[i] = 1;
          field[i] = y[i];
        }
      }
  const CellGrid grid{n, n, slots, bins, 1, 16.0};
  const std::vector<double> exact(cells, 0.0);
  const auto variance = interpolation_variance(grid, y, weight, wanted, field, exact);
  auto at = [&](int r, int c) { return variance[(std::size_t(r) * n + c) * slots + 1]; };
  // The hole's centre is 6 px from the nearest known cell, its edge cells 1 px.
  CHECK(at(20, 20) == Approx(2.0 * a * a * 36 / 4).epsilon(1e-9));
  CHECK(at(15, 20) == Approx(2.0 * a * a * 1 / 4).epsilon(1e-9));
  CHECK(at(17, 20) == Approx(2.0 * a * a * 9 / 4).epsilon(1e-9));
  // Known cells get none.
  CHECK(std::isnan(at(5, 5)));

  SECTION("a known cell that is itself an estimate adds its variance") {
    // The ring of known cells around the hole (rows and columns 14 and 26) carries variance v;
    // every cell of the hole takes its distance, and its source, from that ring.
    const double v = 0.004;
    std::vector<double> known(cells, 0.0);
    for (int r = 0; r < n; ++r)
      for (int c = 0; c < n; ++c) {
        const bool ring = (r == hole0 - 1 || r == hole1 + 1 || c == hole0 - 1 || c == hole1 + 1) &&
                          r >= hole0 - 1 && r <= hole1 + 1 && c >= hole0 - 1 && c <= hole1 + 1;
        if (ring) known[(std::size_t(r) * n + c) * slots + 1] = v;
      }
    const auto with_source = interpolation_variance(grid, y, weight, wanted, field, known);
    auto at2 = [&](int r, int c) { return with_source[(std::size_t(r) * n + c) * slots + 1]; };
    CHECK(at2(20, 20) == Approx(2.0 * a * a * 36 / 4 + v).epsilon(1e-9));
    CHECK(at2(15, 20) == Approx(2.0 * a * a * 1 / 4 + v).epsilon(1e-9));
    // The other date's ring has no variance.
    CHECK(with_source[(std::size_t(20) * n + 20) * slots] == Approx(2.0 * a * a * 36 / 4).epsilon(1e-9));
  }
}

TEST_CASE("carry_nearest gives each pixel the chamfer distance to the nearest known pixel and its value",
          "[fill][analogue]") {
  // Two known pixels on a 9 x 12 plane. Chamfer weights 1 and sqrt 2 [B86]: exact along rows,
  // columns and diagonals.
  const int rows = 9, cols = 12;
  std::vector<std::uint8_t> known(std::size_t(rows) * cols, 0);
  std::vector<double> distance, carried(known.size(), -1.0);
  auto at = [&](int r, int c) { return std::size_t(r) * cols + c; };
  known[at(2, 2)] = 1, carried[at(2, 2)] = 10.0;
  known[at(6, 10)] = 1, carried[at(6, 10)] = 20.0;
  carry_nearest(rows, cols, known, distance, carried);
  CHECK(distance[at(2, 2)] == 0.0);
  CHECK(carried[at(2, 2)] == 10.0);
  CHECK(distance[at(2, 7)] == Approx(5.0));
  CHECK(carried[at(2, 7)] == 10.0);
  CHECK(distance[at(5, 5)] == Approx(3 * std::sqrt(2.0)));
  CHECK(carried[at(5, 5)] == 10.0);
  CHECK(distance[at(8, 10)] == Approx(2.0));
  CHECK(carried[at(8, 10)] == 20.0);
  CHECK(carried[at(4, 11)] == 20.0);  // 2.4 px (chamfer) from (6, 10), 9.8 from (2, 2)

  SECTION("a plane with nothing known carries nothing") {
    std::vector<std::uint8_t> none(known.size(), 0);
    carry_nearest(rows, cols, none, distance, carried);
    CHECK(std::isinf(distance[at(4, 4)]));
    CHECK(std::isnan(carried[at(4, 4)]));
  }
}
