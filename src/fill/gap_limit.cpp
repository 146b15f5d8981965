#include "fill/gap_limit.hpp"

#include <cmath>

namespace kalends::detail {

void limit_gaps(const TimeGrid& grid, std::span<const float> weights,
                std::span<const std::uint8_t> rejected, double max_gap_days,
                double max_extrapolation_days, std::span<float> fitted, std::span<float> sd) {
  const bool gap_limit = max_gap_days > 0, end_limit = max_extrapolation_days >= 0;
  if (!gap_limit && !end_limit) return;
  const int n = grid.size;
  auto kept = [&](int s) { return weights[s] > 0 && !rejected[s]; };
  int previous = -1;  // last kept slot before s
  int s = 0;
  while (s < n) {
    if (kept(s)) {
      previous = s++;
      continue;
    }
    int next = s;
    while (next < n && !kept(next)) ++next;
    // Slots s .. next-1 form one gap.
    for (int g = s; g < next; ++g) {
      bool reachable;
      if (previous < 0 && next >= n) {
        reachable = false;
      } else if (previous < 0) {
        reachable = !end_limit || grid.slot_days[next] - grid.slot_days[g] <= max_extrapolation_days;
      } else if (next >= n) {
        reachable = !end_limit || grid.slot_days[g] - grid.slot_days[previous] <= max_extrapolation_days;
      } else {
        reachable = !gap_limit || grid.slot_days[next] - grid.slot_days[previous] <= max_gap_days;
      }
      if (!reachable) fitted[g] = sd[g] = NAN;
    }
    s = next;
  }
}

}  // namespace kalends::detail
