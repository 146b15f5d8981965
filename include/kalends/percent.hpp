// How a share is written for people: never "100.0 %" or "0.0 %" for a share that is not whole
// or nothing (99.95 % had read as all, 0.04 % as none).
#pragma once

#include <algorithm>
#include <string>

#include <fmt/format.h>

namespace kalends {

/// `fraction` (0..1) as "12.3 %"; exactly 0 and 1 only when so, else within 0.1..99.9 %.
/// `decimals` 0 gives "12 %", then 1..99 %.
inline std::string percent_text(double fraction, int decimals = 1) {
  const double least = decimals > 0 ? 0.1 : 1.0;
  const double share = 100.0 * fraction;
  const double shown = fraction >= 1 ? 100.0 : fraction <= 0 ? 0.0 : std::clamp(share, least, 100.0 - least);
  return fmt::format("{:.{}f} %", shown, decimals);
}

}  // namespace kalends
