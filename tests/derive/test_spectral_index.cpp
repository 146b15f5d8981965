#include <catch2/catch.hpp>

#include <cmath>

#include "kalends/spectral_index.hpp"

using namespace kalends;

// NDVI = (NIR - red) / (NIR + red); EVI = 2.5 (NIR - red) / (NIR + 6 red - 7.5 blue + 1)
// (Huete et al. 2002, Remote Sens. Environ. 83:195).
TEST_CASE("spectral indices and their valid range", "[derive]") {
  CHECK(spectral_index(SpectralIndex::ndvi, 0.1f, 0.3f, 0) == Approx(0.5));
  CHECK(spectral_index(SpectralIndex::evi, 0.05f, 0.3f, 0.02f) == Approx(2.5 * 0.25 / (0.3 + 0.3 - 0.15 + 1)));
  CHECK(std::isnan(spectral_index(SpectralIndex::ndvi, 0, 0, 0)));  // zero denominator
  // Blue chosen so that EVI is exactly -1 in real numbers: 3.5 NIR + 3.5 red - 7.5 blue + 1 = 0.
  // In float32 reflectances the computed value lands up to 6.5e-7 below -1 (numpy, float32 inputs,
  // double arithmetic); it is -1, not out of range.
  for (const auto [red, nir] : {std::pair{0.05f, 0.2f}, {0.1f, 0.3f}, {0.02f, 0.05f}}) {
    const float blue = float((3.5 * double(nir) + 3.5 * double(red) + 1.0) / 7.5);
    INFO(red << " " << nir);
    CHECK(spectral_index(SpectralIndex::evi, red, nir, blue) == Approx(-1.0).margin(1e-6));
  }
  // Beyond the range by more than rounding: missing.
  CHECK(std::isnan(spectral_index(SpectralIndex::evi, 0.05f, 0.2f, 0.16f)));  // 2.5 x 0.15 / 0.3 = 1.25
}
