#include "fill/analogue.hpp"

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <mutex>

#include "engine/parallel.hpp"

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

// counts[p, s] = number of the listed cells (p', s) with p' in the (2 radius + 1)^2 window
// around p: a box sum per slot, done as two running sums over whole slot vectors.
void count_in_windows(int rows, int cols, int slots, int radius, const std::vector<std::size_t>& listed,
                      std::vector<std::uint16_t>& counts) {
  const std::size_t plane = std::size_t(cols) * slots;
  std::vector<std::uint16_t> marks(std::size_t(rows) * plane, 0), across(marks.size(), 0);
  for (std::size_t i : listed) marks[i] = 1;
  std::vector<int> running(slots);
  // Along each row.
  for (int r = 0; r < rows; ++r) {
    const std::uint16_t* in = &marks[std::size_t(r) * plane];
    std::uint16_t* out = &across[std::size_t(r) * plane];
    std::fill(running.begin(), running.end(), 0);
    for (int c = 0; c < std::min(cols, radius); ++c)
      for (int s = 0; s < slots; ++s) running[s] += in[std::size_t(c) * slots + s];
    for (int c = 0; c < cols; ++c) {
      if (c + radius < cols)
        for (int s = 0; s < slots; ++s) running[s] += in[std::size_t(c + radius) * slots + s];
      if (c - radius - 1 >= 0)
        for (int s = 0; s < slots; ++s) running[s] -= in[std::size_t(c - radius - 1) * slots + s];
      for (int s = 0; s < slots; ++s) out[std::size_t(c) * slots + s] = std::uint16_t(running[s]);
    }
  }
  // Down each column: rows are whole planes, so running sums of planes.
  counts.assign(marks.size(), 0);
  std::vector<int> column(plane, 0);
  for (int r = 0; r < std::min(rows, radius); ++r)
    for (std::size_t j = 0; j < plane; ++j) column[j] += across[std::size_t(r) * plane + j];
  for (int r = 0; r < rows; ++r) {
    if (r + radius < rows)
      for (std::size_t j = 0; j < plane; ++j) column[j] += across[std::size_t(r + radius) * plane + j];
    if (r - radius - 1 >= 0)
      for (std::size_t j = 0; j < plane; ++j) column[j] -= across[std::size_t(r - radius - 1) * plane + j];
    for (std::size_t j = 0; j < plane; ++j) counts[std::size_t(r) * plane + j] = std::uint16_t(column[j]);
  }
}

// A pair's sums in one season bin: of m, m d, m d^2 and m again (that lane is weighed by the
// kernel's square, for n_eff), m the product of the two weights and d the difference. Four lanes,
// so a kernel tap is one vector multiply and one add (GCC and Clang vector extensions; two SSE2
// operations each on the baseline x86-64, one with AVX). In a struct, so that containers keep
// the 32-byte alignment the AVX clone below relies on (an attribute on a template argument is
// ignored).
using Lanes = double __attribute__((vector_size(32)));
struct alignas(32) Sums4 {
  Lanes lanes;
};

// GCC builds an AVX2 clone beside the baseline and picks one when the program loads (function
// multi-versioning, ifunc). Neither clone targets FMA, so both round every product and sum the
// same way and give the same results (checked on Alaska masked50: identical output with and
// without the clones; -DKALENDS_NO_VECTOR_CLONES builds the baseline alone).
#if defined(__GNUC__) && !defined(__clang__) && defined(__x86_64__) && defined(__linux__) && \
    !defined(KALENDS_NO_VECTOR_CLONES)
#define KALENDS_VECTOR_CLONES __attribute__((target_clones("avx2", "default")))
#else
#define KALENDS_VECTOR_CLONES
#endif

// out[u] = sum_j taps4[j] * sums[at[u] + j], j in order (the same sums as one lane at a time).
// The listed bins are independent, so the processor overlaps their additions.
KALENDS_VECTOR_CLONES
void kernel_sums(const Sums4* sums, const int* at, int n, const Sums4* taps4, int taps, Sums4* out) {
  for (int u = 0; u < n; ++u) {
    const Sums4* around = sums + at[u];
    Lanes total = {0, 0, 0, 0};
    for (int j = 0; j < taps; ++j) total += taps4[j].lanes * around[j].lanes;
    out[u].lanes = total;
  }
}

// Adds each co-observed date's {m, m d, m d^2, m} to its bin, over p's observed slots `slot`
// (bins `bin`; p's weights and values there, in the same order, `wp` and `yp`), and to `all`.
// Without branches: a third of q's dates or more may be missing, at random. Returns whether any
// date was co-observed.
KALENDS_VECTOR_CLONES
bool pair_sums(const double* wp, const double* yp, const double* wq, const double* yq,
               const int* slot, const int* bin, std::size_t n, Sums4* core, Sums4& all) {
  bool shared = false;
  Lanes total = {0, 0, 0, 0};
  for (std::size_t k = 0; k < n; ++k) {
    const int s = slot[k];
    const bool both = wq[s] > 0;
    const double m = both ? wp[k] * wq[s] : 0.0;
    const double d = both ? yp[k] - yq[s] : 0.0;
    const double md = m * d;
    const Lanes add = {m, md, md * d, m};
    core[bin[k]].lanes += add;
    total += add;
    shared |= both;
  }
  all.lanes = total;
  return shared;
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
  // A pair's sums per bin are kept with `half` wrapped copies on each side (the year wraps
  // around), so the kernel centred on bin b reads entries b .. b + 2 half in a row.
  const int taps = 2 * half + 1;
  const int padded = bins + 2 * half;
  // Each margin entry and the core entry it copies.
  std::vector<std::pair<int, int>> margin;
  for (int k = 0; k < padded; ++k)
    if (k < half || k >= half + bins) margin.emplace_back(k, half + ((k - half) % bins + bins) % bins);
  std::vector<Sums4> taps4(kernel.size());
  for (std::size_t j = 0; j < kernel.size(); ++j)
    taps4[j].lanes = Lanes{kernel[j], kernel[j], kernel[j], kernel[j] * kernel[j]};

  // Known values: observed cells (variance 0), then each round's predictions. A round writes
  // its predictions to `estimate` and their propagation variance to `known_variance` (read only
  // where `value` is known); they join `value` after the round, so the result does not depend
  // on the order in which pixels are visited.
  std::vector<double> value(cells, NAN), known_variance(cells, NAN);
  std::vector<int> observations(pixels, 0);
  // Slots with an observation somewhere in the block: on the others (winters, wholly cloudy
  // dates) no neighbour can ever give a prediction.
  std::vector<std::uint8_t> slot_observed(slots, 0);
  for (std::size_t i = 0; i < cells; ++i)
    if (weight[i] > 0) {
      value[i] = y[i];
      known_variance[i] = 0;
      ++observations[i / slots];
      slot_observed[i % slots] = 1;
    }
  // Each pixel's observed slots, in order, with their season bins: a pair's differences need
  // only p's observed dates, often a small part of the regular grid (16-day composites of a
  // summer season on an all-year grid: a third of the slots or less).
  std::vector<std::size_t> first_observed(pixels + 1, 0);
  for (std::size_t p = 0; p < pixels; ++p) first_observed[p + 1] = first_observed[p] + observations[p];
  std::vector<int> observed_slot(first_observed[pixels]), observed_bin(first_observed[pixels]);
  for (std::size_t p = 0, k = 0; p < pixels; ++p)
    for (int s = 0; s < slots; ++s)
      if (weight[p * slots + s] > 0) {
        observed_slot[k] = s;
        observed_bin[k++] = grid.bin_of_slot[std::size_t(s)];
      }

  std::vector<std::size_t> predicted;
  std::mutex predicted_mutex;
  // After the first round a gap can gain a prediction only from a neighbour predicted in the
  // round before: the others were already tried, and whether a pair qualifies depends only on
  // observed dates. `near_new` counts, per cell, the window's cells predicted last round.
  std::vector<std::uint16_t> near_new;
  // For the same reason a pending gap (p, s) of a later round needs only the neighbours whose
  // value at s is new (predicted last round): every pair with an older value there was tried
  // before and failed. `fresh` marks last round's predictions.
  std::vector<std::uint8_t> fresh;
  for (int round = 0; round < settings.rounds; ++round) {
    if (round > 0) {
      count_in_windows(rows, cols, slots, radius, predicted, near_new);
      fresh.assign(cells, 0);
      for (std::size_t i : predicted) fresh[i] = 1;
    }
    predicted.clear();
    // Rows in parallel: a round reads only cells known before it and writes only p's own
    // unknown cells, so the rows are independent.
    parallel_ranges(std::size_t(rows), 2, [&](std::size_t row_begin, std::size_t row_end) {
      std::vector<double> sum_w(slots), sum_wx(slots), count(slots);
      std::vector<Sums4> sums(static_cast<std::size_t>(padded)), around(static_cast<std::size_t>(slots));
      std::vector<int> pending, usable, usable_bin;
      std::vector<double> own_weight, own_value;  // p's, on its observed slots
      std::vector<std::size_t> mine;
      for (int r = int(row_begin); r < int(row_end); ++r)
        for (int c = 0; c < cols; ++c) {
          const std::size_t p = std::size_t(r) * cols + c;
          if (observations[p] == 0) continue;
          pending.clear();
          for (int s = 0; s < slots; ++s)
            if (slot_observed[s] && std::isnan(value[p * slots + s]) &&
                (round == 0 || near_new[p * slots + s] > 0))
              pending.push_back(s);
          if (pending.empty()) continue;
          std::fill(sum_w.begin(), sum_w.end(), 0.0);
          std::fill(sum_wx.begin(), sum_wx.end(), 0.0);
          std::fill(count.begin(), count.end(), 0.0);
          const std::size_t first = first_observed[p], observed_count = first_observed[p + 1] - first;
          own_weight.resize(observed_count);
          own_value.resize(observed_count);
          double own_square = 0;
          for (std::size_t k = 0; k < observed_count; ++k) {
            own_weight[k] = weight[p * slots + observed_slot[first + k]];
            own_value[k] = y[p * slots + observed_slot[first + k]];
            own_square += own_value[k] * own_value[k];
          }
          // The least prior spread of a pair, in the data's own units: 1e-12 at p's level 0.5 (as
          // fixed before), so an sd no longer has a floor near 1e-6 whatever the units (a series in
          // units of 1e-6 had sd 15 times its own). Above 1e-250, as a pair of zeros needs one.
          const double least_prior = std::max(4e-12 * own_square / double(observed_count), 1e-250);
          for (int rr = std::max(0, r - radius); rr <= std::min(rows - 1, r + radius); ++rr)
            for (int cc = std::max(0, c - radius); cc <= std::min(cols - 1, c + radius); ++cc) {
              const std::size_t q = std::size_t(rr) * cols + cc;
              if (q == p || observations[q] == 0) continue;
              const double* vq = &value[q * slots];
              const std::uint8_t* new_at_q = round > 0 ? &fresh[q * slots] : nullptr;
              usable.clear();
              usable_bin.clear();
              for (int s : pending)
                if (new_at_q ? new_at_q[s] != 0 : !std::isnan(vq[s])) {
                  usable.push_back(s);
                  usable_bin.push_back(grid.bin_of_slot[std::size_t(s)]);
                }
              if (usable.empty()) continue;
              // Differences on co-observed dates, summed per season bin, over p's observed slots.
              Sums4* core = sums.data() + half;
              std::fill(core, core + bins, Sums4{});
              Sums4 all;
              if (!pair_sums(own_weight.data(), own_value.data(), &weight[q * slots], &y[q * slots],
                             &observed_slot[first], &observed_bin[first], observed_count, core, all))
                continue;
              for (const auto& [to, from] : margin) sums[std::size_t(to)] = sums[std::size_t(from)];
              // The prior of the seasonal spread: the pair's spread over all its dates.
              const double t0 = all.lanes[0], t1 = all.lanes[1], t2 = all.lanes[2];
              if (t0 < settings.min_pairs_in_all) continue;
              const double prior = std::max(t2 / t0 - (t1 / t0) * (t1 / t0), least_prior);
              kernel_sums(sums.data(), usable_bin.data(), int(usable.size()), taps4.data(), taps,
                          around.data());
              for (std::size_t u = 0; u < usable.size(); ++u) {
                const int s = usable[u];
                const Lanes& sum = around[u].lanes;
                const double s0 = sum[0], s1 = sum[1], s2 = sum[2], k2 = sum[3];
                // n_eff = s0^2 / k2 must reach min_pairs.
                if (!(s0 > 0) || !(k2 > 0) || !(s0 * s0 >= settings.min_pairs * k2)) continue;
                // The variance (spread n_eff + 2 prior) / (n_eff + 2) (1 + 1 / n_eff) + the
                // neighbour's own, spread = s2 / s0 - mean^2, as one fraction over s0^2 and k2:
                // two divisions instead of four (they were a third of the analogue loop's time).
                const double s0_squared = s0 * s0;
                const double spread_s0_squared = std::max(0.0, s2 * s0 - s1 * s1);
                const double numerator = (spread_s0_squared + 2.0 * prior * k2) * (s0_squared + k2);
                const double denominator = (s0_squared + 2.0 * k2) * s0_squared;
                const double inverse_v =
                    denominator / (numerator + known_variance[q * slots + s] * denominator);
                const double mean = s1 / s0;
                sum_w[s] += inverse_v;
                sum_wx[s] += (vq[s] + mean) * inverse_v;
                count[s] += 1.0;
              }
            }
          for (int s : pending) {
            if (!(sum_w[s] > 0)) continue;
            const std::size_t i = p * slots + s;
            estimate[i] = sum_wx[s] / sum_w[s];
            // The next round adds the variance this prediction reports, not 1 / sum_w: the
            // combined predictions share p's own errors, so the inverse-variance sum is
            // overconfident, and rings built on it gave cells deep in a cloud too small an sd
            // (development masks: RMS of error / sd 1.14-1.30 beyond 6 px, 0.97-1.14 now, the
            // values' RMSE unchanged to 1e-4).
            variance[i] = count[s] / sum_w[s];
            known_variance[i] = variance[i];
            mine.push_back(i);
          }
        }
      std::lock_guard lock(predicted_mutex);
      predicted.insert(predicted.end(), mine.begin(), mine.end());
    });
    if (predicted.empty()) break;
    for (std::size_t i : predicted) value[i] = estimate[i];
  }
}

void fill_by_normalised_convolution(const CellGrid& grid, std::vector<double>& field,
                                    std::span<const std::uint8_t> wanted,
                                    std::span<const double> scales, double min_support) {
  const int rows = grid.rows, cols = grid.cols, slots = grid.slots;
  const std::size_t pixels = std::size_t(rows) * cols;
  std::vector<std::vector<double>> taps;
  for (double scale : scales) taps.push_back(gaussian_taps(scale));
  // Dates in parallel: each reads and writes only its own slot.
  parallel_ranges(std::size_t(slots), 1, [&](std::size_t slot_begin, std::size_t slot_end) {
    std::vector<double> values(pixels), support(pixels), scratch;
    std::vector<std::uint8_t> open(pixels);
    for (int s = int(slot_begin); s < int(slot_end); ++s) {
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
  });
}

void carry_nearest(int rows, int cols, std::span<const std::uint8_t> known,
                   std::vector<double>& distance, std::vector<double>& carried) {
  const std::size_t pixels = std::size_t(rows) * cols;
  distance.resize(pixels);
  carried.resize(pixels);
  const double diagonal = std::sqrt(2.0);
  for (std::size_t p = 0; p < pixels; ++p) {
    distance[p] = known[p] ? 0.0 : INFINITY;
    if (!known[p]) carried[p] = NAN;
  }
  auto relax = [&](int r, int c, int dr, int dc, double step) {
    const int rr = r + dr, cc = c + dc;
    if (rr < 0 || rr >= rows || cc < 0 || cc >= cols) return;
    const std::size_t here = std::size_t(r) * cols + c, there = std::size_t(rr) * cols + cc;
    if (distance[there] + step < distance[here]) {
      distance[here] = distance[there] + step;
      carried[here] = carried[there];
    }
  };
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c) {
      relax(r, c, -1, 0, 1.0), relax(r, c, 0, -1, 1.0);
      relax(r, c, -1, -1, diagonal), relax(r, c, -1, 1, diagonal);
    }
  for (int r = rows - 1; r >= 0; --r)
    for (int c = cols - 1; c >= 0; --c) {
      relax(r, c, 1, 0, 1.0), relax(r, c, 0, 1, 1.0);
      relax(r, c, 1, 1, diagonal), relax(r, c, 1, -1, diagonal);
    }
}

std::vector<double> interpolation_variance(const CellGrid& grid, std::span<const double> y,
                                           std::span<const double> weight,
                                           std::span<const std::uint8_t> wanted,
                                           std::span<const double> field,
                                           std::span<const double> known_variance) {
  const int rows = grid.rows, cols = grid.cols, slots = grid.slots;
  const std::size_t pixels = std::size_t(rows) * cols, cells = pixels * slots;
  std::vector<double> out(cells, NAN);
  bool any = false;
  for (std::size_t i = 0; i < cells && !any; ++i) any = wanted[i] && !std::isnan(field[i]);
  if (!any) return out;
  // Distance to the nearest known cell, per date, kept in `out` for now, and that cell's
  // variance.
  std::vector<double> distance(pixels), carried(pixels), source_variance(cells, 0.0);
  std::vector<std::uint8_t> known(pixels);
  double farthest = 0;
  for (int s = 0; s < slots; ++s) {
    for (std::size_t p = 0; p < pixels; ++p) {
      const std::size_t i = p * slots + s;
      known[p] = !wanted[i] && !std::isnan(field[i]);
      carried[p] = known[p] ? known_variance[i] : 0.0;
    }
    carry_nearest(rows, cols, known, distance, carried);
    for (std::size_t p = 0; p < pixels; ++p) {
      const std::size_t i = p * slots + s;
      if (!wanted[i] || std::isnan(field[i]) || std::isinf(distance[p])) continue;
      out[i] = distance[p];
      source_variance[i] = carried[p];
      farthest = std::max(farthest, distance[p]);
    }
  }
  // Semivariogram of the observations at lags 1..max_lag along rows and columns, no farther
  // than the distances need.
  const int max_lag = std::max(
      1, std::min({32, std::max(rows, cols) - 1, int(std::ceil(farthest)) + 1}));
  std::vector<double> sum(max_lag + 1, 0.0), count(max_lag + 1, 0.0);
  auto add_pair = [&](std::size_t a, std::size_t b, int h) {
    if (!(weight[a] > 0 && weight[b] > 0)) return;
    const double d = y[a] - y[b];
    sum[h] += d * d;
    count[h] += 1;
  };
  for (int r = 0; r < rows; ++r)
    for (int c = 0; c < cols; ++c) {
      const std::size_t p = std::size_t(r) * cols + c;
      for (int h = 1; h <= max_lag; ++h) {
        const bool right = c + h < cols, down = r + h < rows;
        if (!right && !down) break;
        for (int s = 0; s < slots; ++s) {
          if (right) add_pair(p * slots + s, (p + h) * slots + s, h);
          if (down) add_pair(p * slots + s, (p + std::size_t(h) * cols) * slots + s, h);
        }
      }
    }
  std::vector<double> gamma(max_lag + 1, NAN);
  double last = NAN;
  for (int h = 1; h <= max_lag; ++h) {
    // Too few pairs at a lag (a small block): keep the last estimate, which is never larger.
    if (count[h] >= 30) last = std::max(std::isnan(last) ? 0.0 : last, 0.5 * sum[h] / count[h]);
    gamma[h] = last;
  }
  for (std::size_t i = 0; i < cells; ++i) {
    double& v = out[i];
    if (std::isnan(v)) continue;
    if (std::isnan(gamma[max_lag])) {
      v = NAN;
      continue;
    }
    const double h = std::min(v, double(max_lag));
    // Linear between the integer lags.
    const int lo = std::max(1, int(std::floor(h)));
    const int hi = std::min(max_lag, lo + 1);
    const double f = std::clamp(h - lo, 0.0, 1.0);
    v = 2.0 * ((1 - f) * gamma[lo] + f * gamma[hi]) + source_variance[i];
  }
  return out;
}

}  // namespace kalends::detail
