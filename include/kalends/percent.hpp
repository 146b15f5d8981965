// How a share is written for people: never "100.0 %" or "0.0 %" for a share that is not whole
// or nothing (99.95 % had read as all, 0.04 % as none).
#pragma once

#include <algorithm>
#include <string>

#include <fmt/format.h>

namespace kalends {

/// `fraction` (0..1) as "12.3 %"; exactly 0 and 1 only when so; a share that would round to
/// either reads "< 0.1 %" or "> 99.9 %" (1 of 120 000 had read "0.1 %"). `decimals` 0 gives
/// "12 %", "< 1 %" and "> 99 %".
inline std::string percent_text(double fraction, int decimals = 1) {
  const double least = decimals > 0 ? 0.1 : 1.0;
  const double share = 100.0 * fraction;
  if (fraction >= 1) return fmt::format("{:.{}f} %", 100.0, decimals);
  if (fraction <= 0) return fmt::format("{:.{}f} %", 0.0, decimals);
  if (share < least) return fmt::format("< {:.{}f} %", least, decimals);
  if (share > 100.0 - least) return fmt::format("> {:.{}f} %", 100.0 - least, decimals);
  return fmt::format("{:.{}f} %", share, decimals);
}

}  // namespace kalends
