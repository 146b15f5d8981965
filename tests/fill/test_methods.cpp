#include <catch2/catch.hpp>

#include <tbb/task_arena.h>

#include <cmath>
#include <cstring>
#include <random>

#include "fill/gap_limit.hpp"
#include "fill/harmonic.hpp"
#include "fill/spacetime.hpp"
#include "fill/whittaker.hpp"
#include "kalends/error.hpp"

using namespace kalends;

TEST_CASE("Whittaker reproduces what its penalty cannot see", "[fill][whittaker]") {
  // A straight line has zero second differences: any lambda returns it unchanged (Eilers 2003).
  MethodOptions options;
  options.lambda = 1e5;
  WhittakerMethod method(options);
  WhittakerMethod::Workspace ws;
  const int n = 30;
  std::vector<float> y(n), w(n, 1.0f), z(n), sd(n);
  std::vector<std::uint8_t> rejected(n);
  for (int i = 0; i < n; ++i) y[i] = 0.1f + 0.02f * i;
  for (int i : {3, 4, 5, 17}) w[i] = 0, y[i] = NAN;
  method.smooth(y, w, z, sd, rejected, ws);
  for (int i = 0; i < n; ++i) CHECK(z[i] == Approx(0.1 + 0.02 * i).margin(1e-5));
}

TEST_CASE("Whittaker marks too-short series unfillable and envelope rejects low values", "[fill][whittaker]") {
  MethodOptions options;
  WhittakerMethod method(options);
  WhittakerMethod::Workspace ws;
  std::vector<float> y(12, NAN), w(12, 0.0f), z(12), sd(12);
  std::vector<std::uint8_t> rejected(12);
  y[4] = 0.5f, w[4] = 1, y[9] = 0.6f, w[9] = 1;  // 2 observations < order + 1
  CHECK_FALSE(method.smooth(y, w, z, sd, rejected, ws).fitted);
  CHECK(std::isnan(z[0]));

  options.envelope_upper = true;
  options.lambda = 10;
  WhittakerMethod envelope(options);
  const int n = 46;
  std::vector<float> s(n), ones(n, 1.0f), fit(n), err(n);
  std::vector<std::uint8_t> rej(n);
  std::mt19937 rng(3);
  std::normal_distribution<float> noise(0.0f, 0.01f);
  for (int i = 0; i < n; ++i) s[i] = 0.5f + 0.3f * std::sin(2 * 3.14159f * i / 23) + noise(rng);
  for (int i : {6, 20, 33}) s[i] -= 0.3f;  // cloud: far below
  envelope.smooth(s, ones, fit, err, rej, ws);
  for (int i : {6, 20, 33}) {
    CHECK(rej[i] == 1);
    CHECK(fit[i] > s[i] + 0.2f);
  }
  int others = 0;
  for (int i = 0; i < n; ++i) others += rej[i];
  CHECK(others <= 3 + 2);  // common practice: a handful of false alarms at most
}

TEST_CASE("Whittaker's sd past float's range is unknown, not infinite", "[fill][whittaker]") {
  // Values near 1e37 with the smallest lambda taken: a gap's variance passes 3.4e38, which had
  // been written inf and stopped the whole fill at the engine's check of the output.
  MethodOptions options;
  options.lambda = 1e-6;
  WhittakerMethod method(options);
  WhittakerMethod::Workspace ws;
  const int n = 40;
  std::vector<float> y(n), w(n, 1.0f), z(n), sd(n);
  std::vector<std::uint8_t> rejected(n);
  for (int i = 0; i < n; ++i) y[i] = float(3e37 * (1.0 + std::sin(i * 0.7)));
  for (int i = 10; i < 30; ++i) w[i] = 0, y[i] = NAN;
  REQUIRE(method.smooth(y, w, z, sd, rejected, ws).fitted);
  int unknown = 0;
  for (int i = 0; i < n; ++i) {
    CHECK_FALSE(std::isinf(sd[i]));
    unknown += std::isnan(sd[i]);
  }
  CHECK(unknown > 0);  // the gap's middle
  CHECK(BlockOutput::sd_value(1e39) != BlockOutput::sd_value(1e39));
  CHECK(BlockOutput::sd_value(3e38) == 3e38f);
  CHECK_THROWS_AS(WhittakerMethod([] {
                    MethodOptions o;
                    o.lambda = 1e-7;
                    return o;
                  }()),
                  UsageError);
}

TEST_CASE("gap limit leaves long gaps and far ends unfilled", "[fill][gaps]") {
  const std::vector<TimePoint> times = [] {
    std::vector<TimePoint> t;
    for (int i = 0; i < 20; ++i) t.push_back(TimePoint{std::int64_t(i) * 16 * 86400});
    return t;
  }();
  const TimeGrid grid = TimeGrid::build(times);
  std::vector<float> w(20, 1.0f), fitted(20, 1.0f), sd(20, 0.1f);
  std::vector<std::uint8_t> rejected(20, 0);
  for (int i : {0, 1, 2, 8, 9, 10, 11, 12, 13, 19}) w[i] = 0;
  detail::limit_gaps(grid, w, rejected, 100, 20, fitted, sd);
  CHECK(std::isnan(fitted[0]));  // 48 days before the first observation > 20
  CHECK(std::isnan(fitted[1]));  // 32 days > 20
  CHECK(fitted[2] == 1.0f);      // 16 days
  for (int i = 8; i <= 13; ++i) CHECK(std::isnan(fitted[i]));  // gap 7..14 = 112 days > 100
  CHECK(fitted[19] == 1.0f);     // 16 days after the last
  rejected[18] = 1;              // a rejected observation does not anchor the curve
  fitted.assign(20, 1.0f);
  detail::limit_gaps(grid, w, rejected, 0, 20, fitted, sd);
  CHECK(std::isnan(fitted[19]));
  CHECK(fitted[10] == 1.0f);     // no gap limit
}

TEST_CASE("method registry and option checks", "[fill][registry]") {
  MethodOptions options;
  CHECK(make_fill_method(options)->name() == "whittaker");
  options.method = "harmonic";
  CHECK(make_fill_method(options)->name() == "harmonic");
  options.method = "kriging";
  CHECK_THROWS_AS(make_fill_method(options), UsageError);
  options.method = "whittaker";
  options.order = 4;
  CHECK_THROWS_AS(make_fill_method(options), UsageError);
  options.order = 2;
  options.lambda = -1;
  CHECK_THROWS_AS(make_fill_method(options), UsageError);
}

TEST_CASE("harmonic fit recovers a pure annual cycle", "[fill][harmonic]") {
  MethodOptions options;
  options.harmonics = 2;
  HarmonicMethod method(options);
  std::vector<double> days;
  std::vector<float> y, w;
  for (int i = 0; i < 69; ++i) {
    days.push_back(16.0 * i);
    y.push_back(float(0.4 + 0.2 * std::cos(2 * M_PI * days.back() / 365.25 - 1.0)));
    w.push_back(i % 5 == 0 ? 0.0f : 1.0f);
  }
  const auto x = method.design(days);
  std::vector<float> z(69), sd(69);
  std::vector<std::uint8_t> rejected(69);
  const auto fit = method.fit(x, y, w, z, sd, rejected);
  REQUIRE(fit.fitted);
  CHECK(fit.coefficients[0] == Approx(0.4).margin(1e-6));
  // cos(a - 1) = cos a cos 1 + sin a sin 1
  CHECK(fit.coefficients[1] == Approx(0.2 * std::cos(1.0)).margin(1e-6));
  CHECK(fit.coefficients[2] == Approx(0.2 * std::sin(1.0)).margin(1e-6));
  for (int i = 0; i < 69; ++i) CHECK(z[i] == Approx(y[i]).margin(1e-5));
}

TEST_CASE("spacetime gives the same values whatever the number of threads", "[fill][spacetime]") {
  // A block's own loops run on the engine's threads (engine/parallel.hpp); their pieces and sums
  // are fixed, so one thread and two must agree to the last bit. Mechanics only: invented data.
  std::vector<TimePoint> times;
  for (int i = 0; i < 46; ++i) times.push_back(TimePoint{std::int64_t(i) * 16 * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const int rows = 40, cols = 37;  // odd sizes: the transforms' unaligned rows
  const std::size_t cells = std::size_t(rows) * cols * grid.size;
  std::mt19937 random(5);
  std::normal_distribution<double> noise(0.0, 0.03);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  std::vector<float> values(cells), weights(cells);
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c)
      for (int s = 0; s < grid.size; ++s) {
        const std::size_t i = (std::size_t(r) * cols + c) * grid.size + s;
        // A cloud that drifts across the block, plus scattered gaps; one corner never seen.
        const bool cloud = std::abs(c - (s * 3) % cols) < 6 || uniform(random) < 0.2 ||
                           (r < 6 && c < 6);
        values[i] = cloud ? NAN
                          : float(0.3 + 0.01 * c + 0.25 * std::sin(2 * M_PI * s * 16 / 365.25) +
                                  noise(random));
        weights[i] = cloud ? 0.0f : 1.0f;
      }
  MethodOptions options;
  options.spacetime_fft_wisdom = "none";
  options.robust = true;
  const auto method = make_spacetime(options);
  const Window all{0, 0, cols, rows};
  const BlockInput in{&grid, all, all, values, weights};
  auto run = [&](int threads) {
    BlockOutput out;
    out.resize(cells);
    tbb::task_arena(threads).execute([&] { method->fill(in, out); });
    return out;
  };
  const BlockOutput one = run(1), two = run(2);
  std::size_t filled = 0;
  for (std::size_t i = 0; i < cells; ++i) {
    REQUIRE(std::memcmp(&one.fitted[i], &two.fitted[i], sizeof(float)) == 0);
    REQUIRE(std::memcmp(&one.sd[i], &two.sd[i], sizeof(float)) == 0);
    REQUIRE(one.rejected[i] == two.rejected[i]);
    filled += std::isfinite(one.fitted[i]) && weights[i] == 0;
  }
  CHECK(filled > cells / 4);  // the gaps were filled, not left NaN on both
}

TEST_CASE("spacetime's values and sd follow the data's units", "[fill][spacetime]") {
  // A variable in units that make its values about 1e-6 (a precipitation rate in kg m-2 s-1):
  // a fixed floor of a pair's spread had held its sd near 5e-7, 15 times its own at scale 1.
  // Mechanics only: invented data.
  std::vector<TimePoint> times;
  for (int i = 0; i < 23; ++i) times.push_back(TimePoint{std::int64_t(i) * 16 * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const int rows = 24, cols = 20;
  const std::size_t cells = std::size_t(rows) * cols * grid.size;
  std::mt19937 random(11);
  std::normal_distribution<double> noise(0.0, 0.01);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  std::vector<float> values(cells), weights(cells), small(cells);
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c)
      for (int s = 0; s < grid.size; ++s) {
        const std::size_t i = (std::size_t(r) * cols + c) * grid.size + s;
        const bool cloud = uniform(random) < 0.3 || (std::abs(r - 12) < 4 && std::abs(c - 10) < 4 && s % 3 == 0);
        values[i] = cloud ? NAN : float(0.3 + 0.01 * c + 0.2 * std::sin(2 * M_PI * s / 23.0) + noise(random));
        weights[i] = cloud ? 0.0f : 1.0f;
        small[i] = values[i] * 1e-6f;
      }
  MethodOptions options;
  options.spacetime_fft_wisdom = "none";
  const auto method = make_spacetime(options);
  const Window all{0, 0, cols, rows};
  auto run = [&](const std::vector<float>& v) {
    const BlockInput in{&grid, all, all, v, weights};
    BlockOutput out;
    out.resize(cells);
    method->fill(in, out);
    return out;
  };
  const BlockOutput one = run(values), scaled = run(small);
  double worst_value = 0, worst_sd = 0;
  for (std::size_t i = 0; i < cells; ++i) {
    if (weights[i] > 0 || !std::isfinite(one.fitted[i])) continue;
    worst_value = std::max(worst_value, std::abs(scaled.fitted[i] * 1e6 - one.fitted[i]));
    worst_sd = std::max(worst_sd, std::abs(scaled.sd[i] * 1e6 / one.sd[i] - 1));
  }
  CHECK(worst_value < 1e-4);
  CHECK(worst_sd < 1e-3);
}

TEST_CASE("spacetime knows no sd for other dates where every observation is of one date", "[fill][spacetime]") {
  // Every pixel observed once, on the same date, with the same value: the filled values of the
  // other 22 dates had sd 0 (certainty) up to 350 days away. Mechanics only: invented data.
  std::vector<TimePoint> times;
  for (int i = 0; i < 23; ++i) times.push_back(TimePoint{std::int64_t(i) * 16 * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const int rows = 12, cols = 10, observed_slot = 7;
  const std::size_t cells = std::size_t(rows) * cols * grid.size;
  std::vector<float> values(cells, NAN), weights(cells, 0.0f);
  for (std::size_t p = 0; p < std::size_t(rows) * cols; ++p) {
    values[p * grid.size + observed_slot] = 0.5f;
    weights[p * grid.size + observed_slot] = 1.0f;
  }
  MethodOptions options;
  options.spacetime_fft_wisdom = "none";
  const auto method = make_spacetime(options);
  const Window all{0, 0, cols, rows};
  const BlockInput in{&grid, all, all, values, weights};
  BlockOutput out;
  out.resize(cells);
  method->fill(in, out);
  check_block_output(*method, out, cells);
  for (std::size_t i = 0; i < cells; ++i) {
    CAPTURE(i);
    REQUIRE(std::isfinite(out.fitted[i]));
    if (int(i % grid.size) == observed_slot) CHECK(std::isfinite(out.sd[i]));
    else CHECK(std::isnan(out.sd[i]));
  }
}

TEST_CASE("spacetime's sd does not fall deeper into a cloud than its rings reach", "[fill][spacetime]") {
  // One date lies under a 40 x 40 px cloud; the rings of analogues reach halo / radius = 2
  // rounds of 6 px into it, the model alone fills the rest. A value there is no better known
  // than the reached cells nearest to it. Mechanics only: invented data.
  std::vector<TimePoint> times;
  for (int i = 0; i < 46; ++i) times.push_back(TimePoint{std::int64_t(i) * 16 * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const int rows = 60, cols = 60, cloudy = 20, edge0 = 10, edge1 = 49;
  const std::size_t cells = std::size_t(rows) * cols * grid.size;
  std::mt19937 random(7);
  std::normal_distribution<double> noise(0.0, 0.03);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  std::vector<double> level(std::size_t(rows) * cols);
  for (double& l : level) l = 0.2 + 0.3 * uniform(random);
  std::vector<float> values(cells), weights(cells);
  auto depth = [&](int r, int c) {  // Chebyshev distance to the nearest cell outside the cloud
    return std::min({r - edge0 + 1, edge1 + 1 - r, c - edge0 + 1, edge1 + 1 - c});
  };
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c)
      for (int s = 0; s < grid.size; ++s) {
        const std::size_t i = (std::size_t(r) * cols + c) * grid.size + s;
        const bool cloud = (s == cloudy && depth(r, c) > 0) || uniform(random) < 0.1;
        values[i] = cloud ? NAN
                          : float(level[std::size_t(r) * cols + c] +
                                  0.25 * std::sin(2 * M_PI * s * 16 / 365.25) + noise(random));
        weights[i] = cloud ? 0.0f : 1.0f;
      }
  MethodOptions options;
  options.spacetime_fft_wisdom = "none";
  options.spacetime_halo = 12;
  options.spacetime_neighbour_radius = 6;
  const auto method = make_spacetime(options);
  const Window all{0, 0, cols, rows};
  BlockOutput out;
  out.resize(cells);
  method->fill(BlockInput{&grid, all, all, values, weights}, out);
  double deepest_reached = INFINITY, beyond = INFINITY;
  for (int r = edge0; r <= edge1; ++r)
    for (int c = edge0; c <= edge1; ++c) {
      const double sd = out.sd[(std::size_t(r) * cols + c) * grid.size + cloudy];
      REQUIRE(std::isfinite(sd));
      if (depth(r, c) > 12) beyond = std::min(beyond, sd);
      else if (depth(r, c) > 6) deepest_reached = std::min(deepest_reached, sd);
    }
  CHECK(beyond >= deepest_reached);
}

TEST_CASE("the engine checks what a method returns", "[fill][contract]") {
  // A method that leaves a pixel alone leaves NaN (not filled), where zeros had been written as
  // filled values of 0 with sd 0; a wrong size or a negative sd is the method's defect, named.
  BlockOutput out;
  out.resize(6);
  for (std::size_t i = 0; i < 6; ++i) {
    CHECK(std::isnan(out.fitted[i]));
    CHECK(std::isnan(out.sd[i]));
  }
  MethodOptions options;
  options.lambda = 10.0;
  const WhittakerMethod whittaker(options);
  CHECK_NOTHROW(check_block_output(whittaker, out, 6));
  out.sd[2] = 0.5f;
  CHECK_NOTHROW(check_block_output(whittaker, out, 6));
  out.sd[3] = -1.0f;
  CHECK_THROWS_WITH(check_block_output(whittaker, out, 6), Catch::Contains("returned an sd of -1"));
  out.sd[3] = INFINITY;
  CHECK_THROWS_AS(check_block_output(whittaker, out, 6), std::logic_error);
  out.sd[3] = NAN;
  out.fitted.resize(4);
  CHECK_THROWS_WITH(check_block_output(whittaker, out, 6),
                    Catch::Contains("fill method 'whittaker' returned 4 values, 6 sd and 6 rejection marks for a block of 6 cells"));
}
