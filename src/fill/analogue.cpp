#include "fill/analogue.hpp"

#include <algorithm>
#include <cmath>

namespace kalends::detail {

namespace {

// Day-of-year kernel over bin offsets -half..half, truncated at 3 sd and never wider than the
// year (a bin must not be counted twice).
std::vector<double> season_kernel(const CellGrid& grid, double season_days, int& half) {
  half = int(std::ceil(3.0 * season_days / grid.bin_days));
  half = std::max(0, std::min(half, (grid.bins - 1) / 2));
  std::vector<double> k(2 * std::size_t(half) + 1);
  for (int j = -half; j <= half; ++j) {
    const double d = j * grid.bin_days / season_days;
    k[std::size_t(j + half)] = std::exp(-0.5 * d * d);
  }
  return k;
}

// Gaussian taps of sd `sigma`, truncated at 3 sd.
std::vector<double> gaussian_taps(double sigma) {
  const int half = std::max(1, int(std::ceil(3.0 * sigma)));
  std::vector<double> taps(2 * std::size_t(half) + 1);
  for (int j = -half; j <= half; ++j) taps[std::size_t(j + half)] = std::exp(-0.5 * (j / sigma) * (j / sigma));
  double sum = 0;
  for (double t : taps) sum += t;
  for (double& t : taps) t /= sum;
  return taps;
}

// Separable convolution of one rows x cols plane with zero outside it.
void convolve_plane(int rows, int cols, const std::vector<double>& taps, std::vector<double>& plane,
                    std::vector<double>& scratch) {
  const int half = int(taps.size() / 2);
  scratch.assign(plane.size(), 0.0);
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c) {
      double s = 0;
      const int j0 = std::max(-half, -c), j1 = std::min(half, cols - 1 - c);
      for (int j = j0; j <= j1; ++j) s += taps[std::size_t(j + half)] * plane[std::size_t(r) * cols + c + j];
      scratch[std::size_t(r) * cols + c] = s;
    }
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c) {
      double s = 0;
      const int j0 = std::max(-half, -r), j1 = std::min(half, rows - 1 - r);
      for (int j = j0; j <= j1; ++j) s += taps[std::size_t(j + half)] * scratch[std::size_t(r + j) * cols + c];
      plane[std::size_t(r) * cols + c] = s;
    }
}

}  // namespace

void predict_by_analogues(const CellGrid& grid, std::span<const double> y,
                          std::span<const double> weight, const AnalogueSettings& settings,
                          std::vector<double>& estimate, std::vector<double>& variance) {
  const int rows = grid.rows, cols = grid.cols, slots = grid.slots, bins = grid.bins;
  const std::size_t pixels = std::size_t(rows) * cols, cells = pixels * slots;
  estimate.assign(cells, NAN);
  variance.assign(cells, NAN);
  int half = 0;
  const std::vector<double> kernel = season_kernel(grid, settings.season_days, half);
  const int radius = settings.radius;

  // Known values: observed cells (variance 0), then each round's predictions. A round writes
  // its predictions to `estimate` and their propagation variance to `known_variance` (read only
  // where `value` is known); they join `value` after the round, so the result does not depend
  // on the order in which pixels are visited.
  std::vector<double> value(cells, NAN), known_variance(cells, NAN);
  std::vector<int> observations(pixels, 0);
  for (std::size_t i = 0; i < cells; ++i)
    if (weight[i] > 0) {
      value[i] = y[i];
      known_variance[i] = 0;
      ++observations[i / slots];
    }

  std::vector<double> sum_w(slots), sum_wx(slots), count(slots);
  std::vector<double> b0(bins), b1(bins), b2(bins);
  std::vector<int> pending;
  std::vector<std::size_t> predicted;
  for (int round = 0; round < settings.rounds; ++round) {
    predicted.clear();
    for (int r = 0; r < rows; ++r)
      for (int c = 0; c < cols; ++c) {
        const std::size_t p = std::size_t(r) * cols + c;
        if (observations[p] == 0) continue;
        pending.clear();
        for (int s = 0; s < slots; ++s)
          if (std::isnan(value[p * slots + s])) pending.push_back(s);
        if (pending.empty()) continue;
        std::fill(sum_w.begin(), sum_w.end(), 0.0);
        std::fill(sum_wx.begin(), sum_wx.end(), 0.0);
        std::fill(count.begin(), count.end(), 0.0);
        for (int rr = std::max(0, r - radius); rr <= std::min(rows - 1, r + radius); ++rr)
          for (int cc = std::max(0, c - radius); cc <= std::min(cols - 1, c + radius); ++cc) {
            const std::size_t q = std::size_t(rr) * cols + cc;
            if (q == p || observations[q] == 0) continue;
            const double* vq = &value[q * slots];
            bool useful = false;
            for (int s : pending) useful |= !std::isnan(vq[s]);
            if (!useful) continue;
            // Differences on co-observed dates, summed per season bin.
            std::fill(b0.begin(), b0.end(), 0.0);
            std::fill(b1.begin(), b1.end(), 0.0);
            std::fill(b2.begin(), b2.end(), 0.0);
            bool shared = false;  // any co-observed date
            for (int s = 0; s < slots; ++s) {
              const double wp = weight[p * slots + s], wq = weight[q * slots + s];
              if (!(wp > 0 && wq > 0)) continue;
              const double m = wp * wq, d = y[p * slots + s] - y[q * slots + s];
              const int b = grid.bin_of_slot[std::size_t(s)];
              b0[b] += m;
              b1[b] += m * d;
              b2[b] += m * d * d;
              shared = true;
            }
            if (!shared) continue;
            // The prior of the seasonal spread: the pair's spread over all its dates.
            double t0 = 0, t1 = 0, t2 = 0;
            for (int b = 0; b < bins; ++b) t0 += b0[b], t1 += b1[b], t2 += b2[b];
            if (t0 < settings.min_pairs_in_all) continue;
            const double prior = std::max(t2 / t0 - (t1 / t0) * (t1 / t0), 1e-12);
            for (int s : pending) {
              if (std::isnan(vq[s])) continue;
              const int b = grid.bin_of_slot[std::size_t(s)];
              double s0 = 0, s1 = 0, s2 = 0, k2 = 0;
              for (int j = -half; j <= half; ++j) {
                const int bb = ((b + j) % bins + bins) % bins;
                const double k = kernel[std::size_t(j + half)];
                s0 += k * b0[bb];
                s1 += k * b1[bb];
                s2 += k * b2[bb];
                k2 += k * k * b0[bb];
              }
              if (!(s0 > 0) || !(k2 > 0)) continue;
              const double n_eff = s0 * s0 / k2;
              if (n_eff < settings.min_pairs) continue;
              const double mean = s1 / s0, spread = std::max(0.0, s2 / s0 - mean * mean);
              const double v = (spread * n_eff + 2.0 * prior) / (n_eff + 2.0) * (1.0 + 1.0 / n_eff) +
                               known_variance[q * slots + s];
              sum_w[s] += 1.0 / v;
              sum_wx[s] += (vq[s] + mean) / v;
              count[s] += 1.0;
            }
          }
        for (int s : pending) {
          if (!(sum_w[s] > 0)) continue;
          const std::size_t i = p * slots + s;
          estimate[i] = sum_wx[s] / sum_w[s];
          known_variance[i] = 1.0 / sum_w[s];
          variance[i] = count[s] / sum_w[s];
          predicted.push_back(i);
        }
      }
    if (predicted.empty()) break;
    for (std::size_t i : predicted) value[i] = estimate[i];
  }
}

void fill_by_normalised_convolution(const CellGrid& grid, std::vector<double>& field,
                                    std::span<const std::uint8_t> wanted,
                                    std::span<const double> scales, double min_support) {
  const int rows = grid.rows, cols = grid.cols, slots = grid.slots;
  const std::size_t pixels = std::size_t(rows) * cols;
  std::vector<double> values(pixels), support(pixels), scratch;
  std::vector<std::uint8_t> open(pixels);
  std::vector<std::vector<double>> taps;
  for (double scale : scales) taps.push_back(gaussian_taps(scale));
  for (int s = 0; s < slots; ++s) {
    std::size_t left = 0;
    for (std::size_t p = 0; p < pixels; ++p) {
      const std::size_t i = p * slots + s;
      open[p] = wanted[i] && std::isnan(field[i]);
      left += open[p];
    }
    for (std::size_t k = 0; k < scales.size() && left > 0; ++k) {
      const bool last = k + 1 == scales.size();
      for (std::size_t p = 0; p < pixels; ++p) {
        const double v = field[p * slots + s];
        // Only values known before this date's pass: cells filled at a smaller scale do not
        // feed a larger one.
        const bool known = !std::isnan(v) && open[p] != 2;
        values[p] = known ? v : 0.0;
        support[p] = known ? 1.0 : 0.0;
      }
      convolve_plane(rows, cols, taps[k], values, scratch);
      convolve_plane(rows, cols, taps[k], support, scratch);
      for (std::size_t p = 0; p < pixels; ++p) {
        if (open[p] != 1) continue;
        if (support[p] >= min_support || (last && support[p] > 1e-9)) {
          field[p * slots + s] = values[p] / support[p];
          open[p] = 2;
          --left;
        }
      }
    }
  }
}

}  // namespace kalends::detail
