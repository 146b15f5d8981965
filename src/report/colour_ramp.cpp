// Viridis and the Okabe-Ito palette; sources in colour_ramp.hpp.
#include "report/colour_ramp.hpp"

#include <algorithm>
#include <cmath>

#include <fmt/format.h>

namespace kalends::detail {

namespace {

constexpr std::array<std::uint32_t, 10> viridis_anchors{0x440154, 0x482878, 0x3E4A89, 0x31688E, 0x26828E,
                                                        0x1F9E89, 0x35B779, 0x6DCD59, 0xB4DE2C, 0xFDE725};

Rgb unpack(std::uint32_t c) {
  return {std::uint8_t(c >> 16), std::uint8_t((c >> 8) & 0xFF), std::uint8_t(c & 0xFF)};
}

}  // namespace

Rgb viridis(double t) {
  if (!(t >= 0)) t = 0;
  t = std::min(1.0, t) * (viridis_anchors.size() - 1);
  const std::size_t i = std::min<std::size_t>(static_cast<std::size_t>(t), viridis_anchors.size() - 2);
  const double f = t - i;
  const Rgb a = unpack(viridis_anchors[i]), b = unpack(viridis_anchors[i + 1]);
  Rgb out;
  for (int k = 0; k < 3; ++k) out[k] = static_cast<std::uint8_t>(std::lround(a[k] + f * (b[k] - a[k])));
  return out;
}

Rgb flag_colour(int flag) {
  switch (flag) {
    case 0: return unpack(0x009E73);
    case 1: return unpack(0xD55E00);
    case 2: return unpack(0x56B4E9);
    default: return unpack(0x000000);
  }
}

std::string hex(const Rgb& c) { return fmt::format("#{:02x}{:02x}{:02x}", c[0], c[1], c[2]); }

}  // namespace kalends::detail
