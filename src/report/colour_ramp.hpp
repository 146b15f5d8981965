// Colours of the report. Continuous layers: viridis (van der Walt, S. and Smith, N., 2015, the
// matplotlib colour map designed to be perceptually uniform, legible in grey scale and to
// readers with the common colour-vision deficiencies); its 10 anchor colours below are the
// usual 10-step sampling of the map (#440154 ... #FDE725, quoted from memory), interpolated
// linearly in sRGB. Categories (fill flags): the palette of Okabe, M. and Ito, K. (2008),
// "Color Universal Design", designed to stay distinct under colour-vision deficiencies.
#pragma once

#include <array>
#include <cstdint>
#include <string>

namespace kalends::detail {

using Rgb = std::array<std::uint8_t, 3>;

/// Viridis at t in [0, 1] (clamped).
Rgb viridis(double t);

/// Fill flag colours: 0 observed (bluish green), 1 rejected (vermillion), 2 filled (sky blue),
/// 3 not filled (black).
Rgb flag_colour(int flag);

std::string hex(const Rgb& c);  // "#rrggbb"

}  // namespace kalends::detail
