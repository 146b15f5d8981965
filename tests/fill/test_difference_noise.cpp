#include <catch2/catch.hpp>

#include <cmath>
#include <random>
#include <vector>

#include "fill/difference_noise.hpp"

using kalends::detail::difference_noise;

TEST_CASE("difference-based noise: 0 on a straight line, whatever the spacing") {
  // The pseudo-residual compares each observation with the line through its neighbours.
  std::vector<float> y(20, NAN);
  std::vector<float> w(20, 0.0f);
  for (int i : {0, 1, 4, 5, 9, 15, 16, 19}) y[i] = float(0.2 + 0.01 * i), w[i] = 1.0f;
  const auto noise = difference_noise(std::span<const float>(y), std::span<const float>(w));
  CHECK(noise.terms == 6);  // 8 observations, the two ends have no pair of neighbours
  CHECK(noise.variance == Approx(0.0).margin(1e-12));
}

TEST_CASE("difference-based noise: alternating noise on a line, equal spacing") {
  // y_i = line + (-1)^i d: e_i = (y_{i-1} + y_{i+1}) / 2 - y_i = -2 d (-1)^i, and
  // e_i^2 / (1/4 + 1/4 + 1) = 8 d^2 / 3 [Gasser, Sroka & Jennen-Steinmetz 1986].
  const double d = 0.05;
  std::vector<float> y(12), w(12, 1.0f);
  for (int i = 0; i < 12; ++i) y[i] = float(0.3 + 0.02 * i + (i % 2 ? -d : d));
  const auto noise = difference_noise(std::span<const float>(y), std::span<const float>(w));
  CHECK(noise.terms == 10);
  CHECK(noise.variance == Approx(8 * d * d / 3).epsilon(1e-5));
}

TEST_CASE("difference-based noise: unbiased for white noise on a line, unequal spacing") {
  // Invented series (mechanics): the mean of the estimate over many series is the noise
  // variance when the signal is straight.
  std::mt19937 random(3);
  std::normal_distribution<double> noise(0.0, 0.04);
  std::uniform_real_distribution<double> uniform(0.0, 1.0);
  double sum = 0;
  const int series = 4000;
  for (int k = 0; k < series; ++k) {
    std::vector<float> y(30, NAN), w(30, 0.0f);
    for (int i = 0; i < 30; ++i)
      if (uniform(random) < 0.5) y[i] = float(0.1 + 0.003 * i + noise(random)), w[i] = 1.0f;
    sum += difference_noise(std::span<const float>(y), std::span<const float>(w)).variance;
  }
  CHECK(sum / series == Approx(0.04 * 0.04).epsilon(0.03));
}

TEST_CASE("difference-based noise: fewer than three observations give none") {
  std::vector<float> y{0.1f, NAN, 0.3f, NAN}, w{1.0f, 0.0f, 1.0f, 0.0f};
  const auto noise = difference_noise(std::span<const float>(y), std::span<const float>(w));
  CHECK(noise.terms == 0);
  CHECK(std::isnan(noise.variance));
}
