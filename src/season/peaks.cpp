// Local maxima and their topographic prominence, defined as in SciPy's signal.find_peaks and
// signal.peak_prominences (SciPy 1.10 documentation: a peak is a sample larger than both
// neighbours, the middle of a flat top rounded down; its prominence is its height above the
// higher of the lowest points reached on either side before meeting a higher sample or the
// series' end). Written here so the same definition runs per pixel in C++; checked against
// SciPy in tests/reference/test_seasons_numpy.py.
#include <cmath>

#include "kalends/season.hpp"

namespace kalends {

std::vector<Peak> find_peaks(std::span<const double> x, double min_prominence) {
  std::vector<Peak> peaks;
  const int n = int(x.size());
  int i = 1;
  const int i_max = n - 1;
  while (i < i_max) {
    if (x[i - 1] < x[i]) {
      int ahead = i + 1;
      while (ahead < i_max && x[ahead] == x[i]) ++ahead;
      if (x[ahead] < x[i]) {
        Peak peak;
        peak.index = (i + ahead - 1) / 2;
        peaks.push_back(peak);
        i = ahead;
      }
    }
    ++i;
  }
  std::vector<Peak> kept;
  for (Peak& peak : peaks) {
    const double top = x[peak.index];
    double left_min = top, right_min = top;
    peak.left_base = peak.right_base = peak.index;
    for (int j = peak.index; j >= 0 && x[j] <= top; --j)
      if (x[j] < left_min) left_min = x[j], peak.left_base = j;
    for (int j = peak.index; j < n && x[j] <= top; ++j)
      if (x[j] < right_min) right_min = x[j], peak.right_base = j;
    peak.prominence = top - std::max(left_min, right_min);
    if (peak.prominence >= min_prominence) kept.push_back(peak);
  }
  return kept;
}

}  // namespace kalends
