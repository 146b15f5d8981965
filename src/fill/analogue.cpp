#include "fill/analogue.hpp"

#include <algorithm>
#include <array>
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

// The day-of-year kernel's sums at the listed bins for four pairs at once (pair_sums4's layout):
// lane i of out[4 b + j] = sum_j' kernel[j'] * soa[3 tap_bin[b, j'] + j] (j < 3), and with the
// kernel's squares on lane 0 for j = 3 (for n_eff), j' in order: the same products, added in the
// same order, as one pair at a time with the year's wrapped margins copied (versions up to
// 0.3.24). The listed bins are independent, so the processor overlaps their additions.
KALENDS_VECTOR_CLONES
void smooth_bins(const Sums4* soa, const int* tap_bin, const int* listed, std::size_t n,
                 const double* kernel, const double* kernel_squared, int taps, Sums4* out) {
  for (std::size_t u = 0; u < n; ++u) {
    const int b = listed[u];
    Lanes k0 = {0, 0, 0, 0}, k1 = k0, k2 = k0, k3 = k0;
    const int* tb = tap_bin + std::size_t(b) * taps;
    for (int j = 0; j < taps; ++j) {
      const Sums4* at = soa + 3 * std::size_t(tb[j]);
      k0 += kernel[j] * at[0].lanes;
      k1 += kernel[j] * at[1].lanes;
      k2 += kernel[j] * at[2].lanes;
      k3 += kernel_squared[j] * at[0].lanes;
    }
    Sums4* o = out + 4 * std::size_t(b);
    o[0].lanes = k0;
    o[1].lanes = k1;
    o[2].lanes = k2;
    o[3].lanes = k3;
  }
}

// A pair's sums over p's observed slots `slot` (bins `bin`; p's weights and values there, in the
// same order, `wp` and `yp`): per season bin, of m, m d and m d^2 over the co-observed dates, m
// the product of the two weights and d the difference, and the same over all dates. Four
// neighbours at once, one in each lane: lane i of soa[3 b + j] is what the one-pair version of
// versions up to 0.3.24 put in lane j of its core[b] for neighbour i (lane 3 there equals lane 0),
// lane i of total[j] what it put in `all`; `shared[i]`: whether any date was co-observed.
// Without branches (a third of q's dates or more may be missing, at random): the terms are
// computed for every date and masked to 0 where q has no weight, whatever yq holds there.
// Each neighbour's sums are added in the same order with the same operations, so the values
// are the same bits; four pairs share each pass over p's dates, and the running totals, one
// dependent chain per pair before, carry four pairs each.
KALENDS_VECTOR_CLONES
void pair_sums4(const double* wp, const double* yp, const double* const* wq,
                const double* const* yq, const int* slot, const int* bin, std::size_t n,
                Sums4* soa, Lanes* total, bool* shared) {
  const Lanes zero = {0, 0, 0, 0};
  Lanes t0 = zero, t1 = zero, t2 = zero;
  Lanes seen = zero;
  for (std::size_t k = 0; k < n; ++k) {
    const int s = slot[k];
    const Lanes w = {wq[0][s], wq[1][s], wq[2][s], wq[3][s]};
    const Lanes v = {yq[0][s], yq[1][s], yq[2][s], yq[3][s]};
    const auto both = w > zero;
    const Lanes m0 = wp[k] * w;
    const Lanes d = yp[k] - v;
    const Lanes md0 = m0 * d;
    const Lanes m = both ? m0 : zero, md = both ? md0 : zero, md2 = both ? md0 * d : zero;
    Sums4* at = soa + 3 * std::size_t(bin[k]);
    at[0].lanes += m;
    at[1].lanes += md;
    at[2].lanes += md2;
    t0 += m;
    t1 += md;
    t2 += md2;
    seen = both ? w : seen;
  }
  total[0] = t0;
  total[1] = t1;
  total[2] = t2;
  for (int i = 0; i < 4; ++i) shared[i] = seen[i] > 0;
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
  const int taps = 2 * half + 1;
  // The core bin of each bin's kernel taps (the year wraps around), and the taps' squares (for
  // n_eff).
  std::vector<int> tap_bin(std::size_t(bins) * taps);
  for (int b = 0; b < bins; ++b)
    for (int j = 0; j < taps; ++j) tap_bin[std::size_t(b) * taps + j] = ((b - half + j) % bins + bins) % bins;
  std::vector<double> kernel_squared(kernel.size());
  for (std::size_t j = 0; j < kernel.size(); ++j) kernel_squared[j] = kernel[j] * kernel[j];

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

  // Per pixel, one bit per slot, in words of 64: the slots a neighbour can lend a value on in
  // this round (round 0: its known values; later rounds: those predicted in the round before).
  // A pending gap's usable neighbours are then one AND per word, not a test per slot and
  // neighbour.
  const std::size_t words = (std::size_t(slots) + 63) / 64;
  std::vector<std::uint64_t> lend_bits(pixels * words, 0);
  auto may_lend = [&](std::size_t i) {  // cell i = pixel i / slots, slot i % slots
    lend_bits[(i / slots) * words + (i % slots) / 64] |= std::uint64_t(1) << ((i % slots) % 64);
  };
  for (std::size_t i = 0; i < cells; ++i)
    if (!std::isnan(value[i])) may_lend(i);
  std::vector<std::size_t> predicted;
  std::mutex predicted_mutex;
  // After the first round a gap can gain a prediction only from a neighbour predicted in the
  // round before: the others were already tried, and whether a pair qualifies depends only on
  // observed dates. `near_new` counts, per cell, the window's cells predicted last round.
  std::vector<std::uint16_t> near_new;
  // For the same reason a pending gap (p, s) of a later round needs only the neighbours whose
  // value at s is new (predicted last round): every pair with an older value there was tried
  // before and failed. `lend_bits` marks last round's predictions then.
  for (int round = 0; round < settings.rounds; ++round) {
    if (round > 0) {
      count_in_windows(rows, cols, slots, radius, predicted, near_new);
      std::fill(lend_bits.begin(), lend_bits.end(), 0);
      for (std::size_t i : predicted) may_lend(i);
    }
    predicted.clear();
    // Rows in parallel: a round reads only cells known before it and writes only p's own
    // unknown cells, so the rows are independent.
    parallel_ranges(std::size_t(rows), 2, [&](std::size_t row_begin, std::size_t row_end) {
      std::vector<double> sum_w(slots), sum_wx(slots), count(slots);
      std::vector<int> pending, usable, usable_bin;
      std::vector<std::uint64_t> pending_bits(words);
      // Up to four neighbours with usable dates, summed together (pair_sums4), then each
      // finished in the window's order, as one at a time.
      struct Candidate {
        std::size_t q;
        std::size_t from, count;  // its usable slots in `usable` / `usable_bin`
      };
      std::array<Candidate, 4> batch;
      int batched = 0;
      std::vector<Sums4> soa(3 * std::size_t(bins)), smoothed(4 * std::size_t(bins));
      std::vector<std::uint8_t> bin_needed(std::size_t(bins), 0);
      std::vector<int> needed_bins;
      Lanes totals[3];
      bool shared[4];
      std::vector<double> own_weight, own_value;  // p's, on its observed slots
      std::vector<std::size_t> mine;
      for (int r = int(row_begin); r < int(row_end); ++r)
        for (int c = 0; c < cols; ++c) {
          const std::size_t p = std::size_t(r) * cols + c;
          if (observations[p] == 0) continue;
          pending.clear();
          std::fill(pending_bits.begin(), pending_bits.end(), 0);
          for (int s = 0; s < slots; ++s)
            if (slot_observed[s] && std::isnan(value[p * slots + s]) &&
                (round == 0 || near_new[p * slots + s] > 0)) {
              pending.push_back(s);
              pending_bits[std::size_t(s) / 64] |= std::uint64_t(1) << (s % 64);
            }
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
          // Finishes the batch's neighbours in the order they were listed.
          auto finish_batch = [&] {
            if (batched == 0) return;
            const double* wq[4];
            const double* yq[4];
            for (int i = 0; i < 4; ++i) {
              const std::size_t q = batch[std::size_t(i < batched ? i : 0)].q;
              wq[i] = &weight[q * slots];
              yq[i] = &y[q * slots];
            }
            std::fill(soa.begin(), soa.end(), Sums4{});
            pair_sums4(own_weight.data(), own_value.data(), wq, yq, &observed_slot[first],
                       &observed_bin[first], observed_count, soa.data(), totals, shared);
            // The day-of-year kernel's sums at the bins the batch lists, for the four pairs at
            // once: lane i of smoothed[4 b + j] is lane j of what the one-pair version (up to
            // 0.3.24) gave for pair i at bin b (the same products added in the same order; the
            // year wraps around through `tap_bin` instead of copied margins).
            needed_bins.clear();
            for (int i = 0; i < batched; ++i)
              for (std::size_t u = 0; u < batch[std::size_t(i)].count; ++u) {
                const int b = usable_bin[batch[std::size_t(i)].from + u];
                if (!bin_needed[std::size_t(b)]) {
                  bin_needed[std::size_t(b)] = 1;
                  needed_bins.push_back(b);
                }
              }
            for (const int b : needed_bins) bin_needed[std::size_t(b)] = 0;
            smooth_bins(soa.data(), tap_bin.data(), needed_bins.data(), needed_bins.size(),
                        kernel.data(), kernel_squared.data(), taps, smoothed.data());
            for (int i = 0; i < batched; ++i) {
              if (!shared[i]) continue;
              const Candidate& cand = batch[std::size_t(i)];
              const std::size_t q = cand.q;
              const double* vq = &value[q * slots];
              // The prior of the seasonal spread: the pair's spread over all its dates.
              const double t0 = totals[0][i], t1 = totals[1][i], t2 = totals[2][i];
              if (t0 < settings.min_pairs_in_all) continue;
              const double prior = std::max(t2 / t0 - (t1 / t0) * (t1 / t0), least_prior);
              const int* listed = usable.data() + cand.from;
              const int* listed_bin = usable_bin.data() + cand.from;
              for (std::size_t u = 0; u < cand.count; ++u) {
                const int s = listed[u];
                const Sums4* sum = &smoothed[4 * std::size_t(listed_bin[u])];
                const double s0 = sum[0].lanes[i], s1 = sum[1].lanes[i], s2 = sum[2].lanes[i],
                             k2 = sum[3].lanes[i];
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
            batched = 0;
            usable.clear();
            usable_bin.clear();
          };
          usable.clear();
          usable_bin.clear();
          batched = 0;
          for (int rr = std::max(0, r - radius); rr <= std::min(rows - 1, r + radius); ++rr)
            for (int cc = std::max(0, c - radius); cc <= std::min(cols - 1, c + radius); ++cc) {
              const std::size_t q = std::size_t(rr) * cols + cc;
              if (q == p || observations[q] == 0) continue;
              const std::uint64_t* lends = &lend_bits[q * words];
              const std::size_t from = usable.size();
              for (std::size_t word = 0; word < words; ++word)
                for (std::uint64_t both = pending_bits[word] & lends[word]; both; both &= both - 1) {
                  const int s = int(word * 64) + __builtin_ctzll(both);
                  usable.push_back(s);
                  usable_bin.push_back(grid.bin_of_slot[std::size_t(s)]);
                }
              if (usable.size() == from) continue;
              batch[std::size_t(batched++)] = {q, from, usable.size() - from};
              if (batched == 4) finish_batch();
            }
          finish_batch();
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
