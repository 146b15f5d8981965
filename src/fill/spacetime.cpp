#include "fill/spacetime.hpp"

#include "engine/parallel.hpp"
#include "fill/analogue.hpp"
#include "fill/pls_gcv.hpp"
#include "io/json_text.hpp"
#include "io/text_file.hpp"

#include <algorithm>
#include <cmath>
#include <fmt/format.h>
#include <vector>

#include "kalends/error.hpp"

namespace kalends {

namespace {

constexpr double min_bin_days = 8.0;
constexpr int backfitting_rounds = 2;
// The solves' vectors in single precision (dct_pls.hpp) where the tolerance is within its reach:
// 1e-5 and coarser; finer ones in double.
bool solves_in_single_precision(double tolerance) { return tolerance >= 1e-5; }
// Bisquare constant for 95 % efficiency under Gaussian noise [HM07].
constexpr double bisquare_c = 4.685;
// Neighbouring-bin kernel for a pixel's own seasonal deviation (common practice).
constexpr double bin_kernel[] = {0.25, 0.5, 1.0, 0.5, 0.25};
constexpr int bin_kernel_half = 2;
// Share of the model in an analogue-filled value. Chosen on transplanted masks of the observed
// Alaska stack (validate --seed 102), never on the masked files used for the accuracy claims.
constexpr double model_share = 0.3;
// Normalised convolution sds (pixels) and the least kernel weight on known cells for the
// smaller ones (common practice: about one known cell in twenty).
constexpr double convolution_scales[] = {2.0, 4.0, 8.0};
constexpr double convolution_support = 0.05;

// Sums of a per-pixel quantity over the window of `radius` pixels around each pixel, clipped to
// the block: a summed-area table, one lookup per window.
class WindowSums {
 public:
  template <typename Value>
  WindowSums(int rows, int cols, Value&& value_at_pixel)
      : rows_(rows), cols_(cols), table_(std::size_t(rows + 1) * (cols + 1), 0.0) {
    for (int r = 0; r < rows; ++r)
      for (int c = 0; c < cols; ++c)
        at(r + 1, c + 1) = value_at_pixel(std::size_t(r) * cols + c) + at(r, c + 1) + at(r + 1, c) -
                           at(r, c);
  }
  double around(int r, int c, int radius) const {
    const int r0 = std::max(0, r - radius), r1 = std::min(rows_, r + radius + 1);
    const int c0 = std::max(0, c - radius), c1 = std::min(cols_, c + radius + 1);
    return at(r1, c1) - at(r0, c1) - at(r1, c0) + at(r0, c0);
  }

 private:
  double& at(int r, int c) { return table_[std::size_t(r) * (cols_ + 1) + c]; }
  double at(int r, int c) const { return table_[std::size_t(r) * (cols_ + 1) + c]; }
  int rows_, cols_;
  std::vector<double> table_;
};

std::string number(double v) { return detail::shortest_number(v); }
std::string number_or_auto(const std::optional<double>& v) { return v ? number(*v) : "auto (GCV)"; }


// Median of the values (reordered).
double median(std::vector<double>& v) {
  if (v.empty()) return 0;
  const auto mid = v.begin() + std::ptrdiff_t(v.size() / 2);
  std::nth_element(v.begin(), mid, v.end());
  return *mid;
}

detail::DctPlanning planning_of(const std::string& wisdom) {
  if (wisdom == "none") return {false, ""};
  if (wisdom == "auto") return {true, detail::default_wisdom_file()};
  return {true, wisdom};
}

}  // namespace

SpacetimeMethod::SpacetimeMethod(const MethodOptions& options)
    : options_(options), plans_(planning_of(options.spacetime_fft_wisdom)) {
  if (options.spacetime_fft_wisdom.empty())
    throw UsageError("--fft-wisdom", "must be auto, none or a file");
  // A folder, or a file in a folder that does not exist, had been taken and the timings
  // silently not kept (found by fuzzing).
  if (options.spacetime_fft_wisdom != "auto" && options.spacetime_fft_wisdom != "none")
    detail::require_file_destination(options.spacetime_fft_wisdom, "--fft-wisdom", "fftw-wisdom");
  // Infinite smoothing had been taken and left every filled value without an sd (NaN).
  if (options.spacetime_space_smoothing &&
      !(*options.spacetime_space_smoothing > 0 && std::isfinite(*options.spacetime_space_smoothing)))
    throw UsageError("--space-smoothing", "must be a positive (finite) number or auto");
  if (options.spacetime_time_smoothing &&
      !(*options.spacetime_time_smoothing > 0 && std::isfinite(*options.spacetime_time_smoothing)))
    throw UsageError("--time-smoothing", "must be a positive (finite) number or auto");
  if (!(options.spacetime_climate_smoothing > 0 && std::isfinite(options.spacetime_climate_smoothing)))
    throw UsageError("--climate-smoothing", "must be a positive (finite) number");
  if (!(options.spacetime_season_smoothing >= 0 && std::isfinite(options.spacetime_season_smoothing)))
    throw UsageError("--season-smoothing", "must be a finite number, 0 or more");
  if (options.spacetime_neighbour_radius < 0 || options.spacetime_neighbour_radius > 32)
    throw UsageError("--neighbour-radius", "must be 0..32 pixels");
  if (options.spacetime_halo < 0 || options.spacetime_halo > 1024)
    throw UsageError("--halo", "must be 0..1024 pixels");
  if (!(options.spacetime_tolerance > 0 && options.spacetime_tolerance < 1))
    throw UsageError("--tolerance", "must lie strictly between 0 and 1");
  if (options.robust && options.iterations < 1) throw UsageError("--iterations", "must be >= 1");
}

MethodParameters SpacetimeMethod::parameters() const {
  return {{"space_smoothing", number_or_auto(options_.spacetime_space_smoothing)},
          {"time_smoothing", number_or_auto(options_.spacetime_time_smoothing)},
          {"climate_smoothing", number(options_.spacetime_climate_smoothing)},
          {"season_smoothing", number(options_.spacetime_season_smoothing)},
          {"halo", std::to_string(options_.spacetime_halo)},
          {"neighbour_radius", std::to_string(options_.spacetime_neighbour_radius)},
          {"tolerance", number(options_.spacetime_tolerance)},
          {"robust", options_.robust ? "yes" : "no"},
          {"never_observed", options_.fill_never_observed ? "fill" : "leave"}};
}

double SpacetimeMethod::season_bin_days(const TimeGrid& grid) {
  return std::max(grid.step_days, min_bin_days);
}

int SpacetimeMethod::season_bins(const TimeGrid& grid, std::vector<int>& bin_of_slot) {
  const double width = season_bin_days(grid);
  const int bins = std::max(1, int(std::ceil(366.0 / width)));
  bin_of_slot.resize(grid.size);
  for (int s = 0; s < grid.size; ++s) {
    const int doy = day_of_year(grid.slot_time(s).date());
    bin_of_slot[s] = std::min(bins - 1, int((doy - 1) / width));
  }
  return bins;
}

std::size_t SpacetimeMethod::scratch_bytes_per_pixel(const TimeGrid& grid) const {
  std::vector<int> bins;
  const int n_bins = season_bins(grid, bins);
  // Per slot: doubles y, w, A, target, support, 4 analogue arrays and the completed field; the
  // solver's 4 vectors and 3 factor bands (the climatology's solve shares them), in single
  // precision with a copy of the weights (8 floats), else 7 doubles, and while its coarse-grid
  // start runs, the same plus 3 doubles for a quarter of the cells, a sixteenth, ... (about 5
  // floats or 4 doubles more); a byte. Per bin 9 doubles. Per pixel 8 doubles: the variance
  // components and their summed-area tables.
  const bool single = solves_in_single_precision(options_.spacetime_tolerance);
  const std::size_t solver = single ? 13 * sizeof(float) : 11 * sizeof(double);
  return (10 * sizeof(double) + solver) * std::size_t(grid.size) +
         sizeof(double) * (9 * std::size_t(n_bins) + 8) +
         std::size_t(grid.size) + 16;
}

void SpacetimeMethod::fill(const BlockInput& in, BlockOutput& out) const {
  const TimeGrid& grid = *in.grid;
  const int rows = in.read.height, cols = in.read.width, n_slots = grid.size;
  const std::size_t pixels = std::size_t(rows) * cols;
  const std::size_t cells = pixels * n_slots;
  std::vector<int> bin_of_slot;
  const int n_bins = season_bins(grid, bin_of_slot);
  const std::size_t bin_cells = pixels * n_bins;
  const detail::Shape3 anomaly_shape{rows, cols, n_slots};
  const detail::Shape3 climate_shape{rows, cols, n_bins};

  // Observations and their weights (robust weights multiply in later).
  std::vector<double> y(cells, 0.0), base_weight(cells, 0.0), weight(cells, 0.0);
  std::vector<int> observations(pixels, 0);
  for (std::size_t i = 0; i < cells; ++i) {
    const float v = in.values[i], w = in.weights[i];
    if (w > 0 && std::isfinite(v)) {
      y[i] = v;
      base_weight[i] = weight[i] = w;
      ++observations[i / n_slots];
    }
  }

  std::int64_t observed_cells = 0;
  for (const int count : observations) observed_cells += count;
  const bool spread_known = observed_cells >= 2;
  // Observations on one date alone tell nothing of how values change in time: the sd of the
  // other dates' values is unknown, where it had been 0 (one value everywhere) up to 640 days away.
  int observed_slot = -1;
  bool one_slot = true;
  for (std::size_t i = 0; i < cells && one_slot; ++i)
    if (weight[i] > 0) {
      const int slot = int(i % n_slots);
      one_slot = observed_slot < 0 || observed_slot == slot;
      observed_slot = slot;
    }

  // Pixels with no observation within the halo on any date: nothing to fill them from. A
  // summed-area table of observation counts makes the window test O(1) per pixel.
  const int radius = options_.spacetime_halo;
  const WindowSums observations_near(rows, cols, [&](std::size_t p) { return double(observations[p]); });
  auto reachable = [&](int r, int c) { return observations_near.around(r, c, radius) > 0; };

  std::vector<double> anomaly(cells, 0.0), target(cells, 0.0);
  std::vector<double> bin_sum(bin_cells), bin_weight(bin_cells), bin_mean(bin_cells);
  std::vector<double> climate_smooth(bin_cells, 0.0), climate(bin_cells);
  std::vector<double> own_sum(bin_cells), own_weight(bin_cells);
  std::vector<double> level(pixels), pixel_weight(pixels);
  std::vector<std::uint8_t> rejected(cells, 0);
  // One solver workspace for both solves: it keeps its buffers, grown to the larger shape, and
  // holds nothing from one solve to the next.
  const bool single_precision = solves_in_single_precision(options_.spacetime_tolerance);
  detail::PlsWorkspace workspace;
  workspace.reserve(cells, single_precision);
  detail::PlsSettings climate_settings{options_.spacetime_climate_smoothing,
                                       options_.spacetime_season_smoothing,
                                       options_.spacetime_tolerance, 500, true, single_precision};
  // An auto smoothing starts GCV's search from MethodOptions' default.
  const MethodOptions defaults;
  detail::PlsSettings anomaly_settings{
      options_.spacetime_space_smoothing.value_or(*defaults.spacetime_space_smoothing),
      options_.spacetime_time_smoothing.value_or(*defaults.spacetime_time_smoothing),
      options_.spacetime_tolerance, 500, true, single_precision};
  // With an auto smoothing, GCV chooses it on the first round's anomaly; later rounds keep it.
  bool choose_smoothing = !options_.spacetime_space_smoothing || !options_.spacetime_time_smoothing;
  // The variance components of the level and the seasonal deviation, per pixel, from the
  // pixels within `components_window` of it: the halo, so a block's core sees the same pixels
  // however the raster was cut (at least 8 px for enough pixels; a smaller halo, like one smaller
  // than the neighbour radius, gives up block independence). Estimated over the whole block, as
  // before version 0.3.4, they made every value depend on the block: 4 blocks against 1 on a
  // 512 x 512 stack differed by up to 0.0078 at a tolerance of 1e-6, 0.0007 with these.
  std::vector<double> shrink(pixels, 1.0), between(pixels, 0.0);
  const int components_window = std::max(8, options_.spacetime_halo);
  bool climate_started = false;

  // The model's loops run over pixels in parallel; their sums in fixed chunks, so the result does
  // not depend on the threads (engine/parallel.hpp).
  constexpr std::size_t pixel_grain = 512, sum_chunk = 1 << 14;
  auto each_pixel = [&](auto&& body) { detail::parallel_each(pixels, pixel_grain, body); };
  auto sum_over = [&](std::size_t n, auto&& term) {
    return detail::deterministic_sum_of(n, sum_chunk, term);
  };
  std::vector<double> pixel_squares(pixels);

  // The first backfitting round is solved to 10 x the tolerance: the second starts from it and
  // solves to the full one. Same RMSE to five decimals on four development mask sets; the
  // bench fill 4.2 -> 3.9 s (2 threads); the block test's largest difference 0.0027 -> 0.0031.
  auto fit_round = [&](bool looser_first_round) {
    const double looser = looser_first_round ? 10.0 : 1.0;
    climate_settings.tolerance = options_.spacetime_tolerance * looser;
    anomaly_settings.tolerance = options_.spacetime_tolerance * looser;
    // S: bin means of y - A, smoothed in space and across bins, weighted by their counts.
    each_pixel([&](std::size_t p) {
      std::fill_n(&bin_sum[p * n_bins], n_bins, 0.0);
      std::fill_n(&bin_weight[p * n_bins], n_bins, 0.0);
      for (int s = 0; s < n_slots; ++s) {
        const std::size_t i = p * n_slots + s;
        if (!(weight[i] > 0)) continue;
        const std::size_t b = p * n_bins + bin_of_slot[s];
        bin_sum[b] += weight[i] * (y[i] - anomaly[i]);
        bin_weight[b] += weight[i];
      }
      for (std::size_t b = p * n_bins; b < (p + 1) * n_bins; ++b)
        bin_mean[b] = bin_weight[b] > 0 ? bin_sum[b] / bin_weight[b] : 0.0;
    });
    const double total = sum_over(bin_cells, [&](std::size_t b) { return bin_sum[b]; });
    const double total_weight = sum_over(bin_cells, [&](std::size_t b) { return bin_weight[b]; });
    if (!(total_weight > 0)) return false;
    // Start from the previous round's S, or the block mean: fewer iterations than from 0.
    if (!climate_started)
      std::fill(climate_smooth.begin(), climate_smooth.end(), total / total_weight);
    climate_started = true;
    detail::solve_pls(plans_, climate_shape, bin_mean, bin_weight, climate_settings, climate_smooth,
                      workspace);

    // d: the pixel's level, shrunk by k = within / between variance [M83].
    each_pixel([&](std::size_t p) {
      double sum = 0, sum_weight = 0;
      for (int s = 0; s < n_slots; ++s) {
        const std::size_t i = p * n_slots + s;
        if (!(weight[i] > 0)) continue;
        sum += weight[i] * (y[i] - anomaly[i] - climate_smooth[p * n_bins + bin_of_slot[s]]);
        sum_weight += weight[i];
      }
      level[p] = sum;
      pixel_weight[p] = sum_weight;
      double squares = 0;
      if (sum_weight > 0) {
        const double mean = sum / sum_weight;
        for (int s = 0; s < n_slots; ++s) {
          const std::size_t i = p * n_slots + s;
          if (!(weight[i] > 0)) continue;
          const double r = y[i] - anomaly[i] - climate_smooth[p * n_bins + bin_of_slot[s]] - mean;
          squares += weight[i] * r * r;
        }
      }
      pixel_squares[p] = squares;
    });
    // Within-pixel variance (pooled), and the variance between the pixels' means beyond their
    // noise [M83], over each pixel's window: box sums of per-pixel terms by summed-area tables.
    auto has_mean = [&](std::size_t p) { return pixel_weight[p] >= 3; };
    auto mean_of = [&](std::size_t p) { return has_mean(p) ? level[p] / pixel_weight[p] : 0.0; };
    const WindowSums squares(rows, cols, [&](std::size_t p) { return pixel_squares[p]; });
    const WindowSums dof(rows, cols, [&](std::size_t p) { return std::max(0.0, pixel_weight[p] - 1.0); });
    const WindowSums counted(rows, cols, [&](std::size_t p) { return has_mean(p) ? 1.0 : 0.0; });
    const WindowSums means(rows, cols, mean_of);
    const WindowSums squared_means(rows, cols, [&](std::size_t p) { return mean_of(p) * mean_of(p); });
    const WindowSums inverse_weights(
        rows, cols, [&](std::size_t p) { return has_mean(p) ? 1.0 / pixel_weight[p] : 0.0; });
    each_pixel([&](std::size_t p) {
      const int r = int(p / cols), c = int(p % cols), window = components_window;
      const double squares_sum = squares.around(r, c, window), dof_sum = dof.around(r, c, window);
      const double mean_sum = means.around(r, c, window);
      const double within = dof_sum > 0 ? squares_sum / dof_sum : 0.0;
      const double n = std::round(counted.around(r, c, window));
      between[p] = n > 1 ? std::max(0.0, (squared_means.around(r, c, window) - mean_sum * mean_sum / n) /
                                                 (n - 1) -
                                             within * inverse_weights.around(r, c, window) / n)
                         : 0.0;
      // Bounded so that neither extreme (no pooling, complete pooling) is reached where too few
      // pixels estimate the two variances.
      shrink[p] = std::clamp(between[p] > 0 ? within / between[p] : 100.0, 0.1, 100.0);
    });

    // f: the pixel's own seasonal deviation, pooled over neighbouring bins, shrunk the same way;
    // then C = S + d + f and the anomaly's target y - C.
    each_pixel([&](std::size_t p) {
      level[p] /= pixel_weight[p] + shrink[p];
      double* own = &own_sum[p * n_bins];
      double* own_w = &own_weight[p * n_bins];
      std::fill_n(own, n_bins, 0.0);
      std::fill_n(own_w, n_bins, 0.0);
      for (int s = 0; s < n_slots; ++s) {
        const std::size_t i = p * n_slots + s;
        if (!(weight[i] > 0)) continue;
        const int b = bin_of_slot[s];
        own[b] += weight[i] * (y[i] - anomaly[i] - climate_smooth[p * n_bins + b] - level[p]);
        own_w[b] += weight[i];
      }
      for (int b = 0; b < n_bins; ++b) {
        double sum_k = 0, weight_k = 0;
        for (int o = -bin_kernel_half; o <= bin_kernel_half; ++o) {
          const int bb = ((b + o) % n_bins + n_bins) % n_bins;  // the year wraps around
          if (n_bins < 2 * bin_kernel_half + 1 && o != 0) continue;
          sum_k += bin_kernel[o + bin_kernel_half] * own[bb];
          weight_k += bin_kernel[o + bin_kernel_half] * own_w[bb];
        }
        const std::size_t at = p * n_bins + b;
        climate[at] = climate_smooth[at] + level[p] + sum_k / (weight_k + shrink[p]);
      }
      for (int s = 0; s < n_slots; ++s) {
        const std::size_t i = p * n_slots + s;
        target[i] = weight[i] > 0 ? y[i] - climate[p * n_bins + bin_of_slot[s]] : 0.0;
      }
    });
    if (choose_smoothing) {
      detail::GcvSearch search;
      search.space_free = !options_.spacetime_space_smoothing;
      search.time_free = !options_.spacetime_time_smoothing;
      const auto probe = detail::trace_probe(anomaly_shape, weight, in.read.y, in.read.x);
      // GCV's candidates at its own tolerances (pls_gcv.hpp), whatever this round's.
      detail::PlsSettings search_settings = anomaly_settings;
      search_settings.tolerance = options_.spacetime_tolerance;
      const detail::GcvChoice choice = detail::choose_smoothing_by_gcv(
          plans_, anomaly_shape, target, weight, probe, search_settings, search, workspace);
      anomaly_settings.s_space = choice.best.s_space;
      anomaly_settings.s_time = choice.best.s_time;
      if (search.space_free) out.chosen["space_smoothing"] = choice.best.s_space;
      if (search.time_free) out.chosen["time_smoothing"] = choice.best.s_time;
      choose_smoothing = false;
    }
    detail::solve_pls(plans_, anomaly_shape, target, weight, anomaly_settings, anomaly, workspace);
    return true;
  };

  const std::size_t core_pixels = std::size_t(in.core.pixels());
  std::fill(out.rejected.begin(), out.rejected.end(), 0);
  bool any = false;
  for (int round = 0; round < backfitting_rounds; ++round)
    any = fit_round(round == 0 && backfitting_rounds > 1);
  if (!any) {
    std::fill(out.fitted.begin(), out.fitted.end(), NAN);
    std::fill(out.sd.begin(), out.sd.end(), NAN);
    return;
  }
  auto model_at = [&](std::size_t p, int s) {
    return climate[p * n_bins + bin_of_slot[s]] + anomaly[p * n_slots + s];
  };
  auto residual_at = [&](std::size_t p, int s) { return y[p * n_slots + s] - model_at(p, s); };
  if (options_.robust) {
    // Each residual against the median of its pixel's three nearest residuals on either side (a
    // running median: a run of up to three cloudy composites does not move it; on residuals, not
    // values, so that a season's curvature is not taken for noise). A value within three of its
    // sd (1.4826 MAD, common practice) of that median is usual for its pixel and no outlier,
    // however far the smooth model misses it: at a sharp edge between fields the model misses a
    // pixel by about as much on every date, and clean values had been rejected and rewritten (a
    // helper: values equal to all their pixel's others moved by up to 0.14). Beyond that reach
    // the bisquare on the model's residual decides, as before.
    constexpr double usual_reach = bisquare_c;
    std::vector<double> own_deviation(cells, NAN);
    std::vector<double> deviations;
    // Each pixel's observed slots, found once: they do not change between rounds (each round
    // had listed them again for every pixel).
    std::vector<int> seen_slots;
    std::vector<std::size_t> seen_from(pixels + 1, 0);
    for (std::size_t p = 0; p < pixels; ++p) {
      seen_from[p] = seen_slots.size();
      for (int s = 0; s < n_slots; ++s)
        if (base_weight[p * n_slots + s] > 0) seen_slots.push_back(s);
    }
    seen_from[pixels] = seen_slots.size();
    std::vector<double> scratch;
    // Deviations within the solver's own precision (its tolerance relative to the values' size)
    // are no evidence: on a field constant everywhere they had set the scale, and 0.8 % of the
    // values were rejected for differences of 1e-5.
    for (std::size_t i = 0; i < cells; ++i)
      if (base_weight[i] > 0) scratch.push_back(std::abs(y[i]));
    const double precision = options_.spacetime_tolerance * (scratch.empty() ? 0.0 : median(scratch));
    for (int it = 0; it < options_.iterations; ++it) {
      deviations.clear();
      for (std::size_t p = 0; p < pixels; ++p) {
        const std::span<const int> seen(seen_slots.data() + seen_from[p], seen_from[p + 1] - seen_from[p]);
        for (std::size_t k = 0; k < seen.size(); ++k) {
          double around[6];
          int count = 0;
          for (std::size_t j = k >= 3 ? k - 3 : 0; j < std::min(seen.size(), k + 4); ++j)
            if (j != k) around[count++] = residual_at(p, seen[j]);
          if (count < 2) continue;
          for (int i = 1; i < count; ++i)  // at most six: insertion
            for (int j = i; j > 0 && around[j] < around[j - 1]; --j) std::swap(around[j], around[j - 1]);
          const double middle = count % 2 ? around[count / 2] : 0.5 * (around[count / 2 - 1] + around[count / 2]);
          const double e = residual_at(p, seen[k]) - middle;
          own_deviation[p * n_slots + seen[k]] = e;
          deviations.push_back(std::abs(e));
        }
      }
      const double own_scale = deviations.empty() ? NAN : std::max(1.4826 * median(deviations), precision);
      scratch.clear();
      for (std::size_t p = 0; p < pixels; ++p)
        for (int s = 0; s < n_slots; ++s)
          if (base_weight[p * n_slots + s] > 0) scratch.push_back(std::abs(residual_at(p, s)));
      const double scale = 1.4826 * median(scratch);
      if (!(scale > 0)) break;
      for (std::size_t p = 0; p < pixels; ++p)
        for (int s = 0; s < n_slots; ++s) {
          const std::size_t i = p * n_slots + s;
          if (!(base_weight[i] > 0)) continue;
          const double u = residual_at(p, s) / (bisquare_c * scale);
          const double e = own_deviation[i];
          const bool usual_for_its_pixel = std::isfinite(e) && std::abs(e) <= usual_reach * own_scale;
          const double bw = usual_for_its_pixel ? 1.0 : std::abs(u) < 1 ? (1 - u * u) * (1 - u * u) : 0.0;
          weight[i] = base_weight[i] * bw;
          rejected[i] = bw == 0.0;
        }
      fit_round(false);
    }
  }

  // Variances for the standard error.
  double ss = 0, ws_sum = 0, target_ss = 0;
  for (std::size_t i = 0; i < cells; ++i) {
    if (!(weight[i] > 0)) continue;
    const std::size_t p = i / n_slots;
    const int s = int(i % n_slots);
    const double r = residual_at(p, s);
    ss += weight[i] * r * r;
    target_ss += weight[i] * target[i] * target[i];
    ws_sum += weight[i];
  }
  const double noise_var = ws_sum > 0 ? ss / ws_sum : 0.0;
  const double anomaly_var = ws_sum > 0 ? std::max(0.0, target_ss / ws_sum - noise_var) : 0.0;
  // h: the observation indicator smoothed by 1 / (1 + p), i.e. how much observed support a cell
  // has nearby in space and time.
  std::vector<double> support(cells);
  for (std::size_t i = 0; i < cells; ++i) support[i] = base_weight[i] > 0 ? 1.0 : 0.0;
  detail::filter_shifted(plans_, anomaly_shape, anomaly_settings, 1.0, support);

  // The local stages: neighbour analogues for the gaps of observed pixels, blended with the
  // model; normalised convolution of the completed field for what is left (analogue.hpp).
  const detail::CellGrid cell_grid{rows, cols, n_slots, bin_of_slot, n_bins, season_bin_days(grid)};
  detail::AnalogueSettings analogue_settings;
  analogue_settings.radius = options_.spacetime_neighbour_radius;
  // Each round reaches `radius` pixels farther; within the halo, a block's core does not depend
  // on where the block was cut.
  if (analogue_settings.radius > 0)
    analogue_settings.rounds =
        std::clamp(options_.spacetime_halo / analogue_settings.radius, 1, analogue_settings.rounds);
  std::vector<double> analogue, analogue_variance;
  if (analogue_settings.radius > 0)
    detail::predict_by_analogues(cell_grid, y, weight, analogue_settings, analogue,
                                 analogue_variance);
  else
    analogue.assign(cells, NAN);
  auto unsupported_anomaly_variance = [&](std::size_t i) {
    return anomaly_var * (1.0 - std::clamp(support[i], 0.0, 1.0));
  };
  auto model_variance_at = [&](std::size_t p, std::size_t i) {
    const double own = between[p] * shrink[p] / (pixel_weight[p] + shrink[p]);
    return noise_var + own + unsupported_anomaly_variance(i);
  };
  // Each cell's value before the convolution, and its error variance where it is a gap of a
  // pixel observed on other dates (0 for an observation).
  std::vector<double> completed(cells), gap_variance(cells, 0.0);
  std::vector<std::uint8_t> wanted(cells, 0);
  for (std::size_t i = 0; i < cells; ++i) {
    const std::size_t p = i / n_slots;
    const double model = model_at(p, int(i % n_slots));
    if (weight[i] > 0) {
      completed[i] = y[i];
    } else if (!std::isnan(analogue[i])) {
      completed[i] = (1.0 - model_share) * analogue[i] + model_share * model;
      gap_variance[i] =
          (1.0 - model_share) * analogue_variance[i] + model_share * model_variance_at(p, i);
    } else if (observations[p] > 0) {
      // Observed on other dates but out of the analogues' reach: the model knows this pixel's
      // own climatology, which a spatial average would lose. Its anomaly here is carried from
      // far away; like a value copied from far off (2 gamma at long lags, 2 sigma_A^2), its
      // error counts the true anomaly's variance and that of the anomaly carried in: the term
      // once more.
      completed[i] = model;
      gap_variance[i] = model_variance_at(p, i) + unsupported_anomaly_variance(i);
    } else {
      completed[i] = NAN;
      wanted[i] = 1;
    }
  }
  // A gap beyond the rings' reach is no better known than the nearest cell the rings reached
  // on its date: uncertainty does not fall deeper into a cloud. Without this its sd was too small
  // (four development mask sets: RMS of error / sd 1.18-1.31 for gaps of observed pixels more
  // than 30 px from their date's nearest observation, 0.82-1.08 with it).
  if (analogue_settings.radius > 0) {
    // The model-only gaps of the loop above.
    auto beyond_reach = [&](std::size_t p, std::size_t i) {
      return observations[p] > 0 && !(weight[i] > 0) && std::isnan(analogue[i]);
    };
    std::vector<std::uint8_t> reached(pixels);
    std::vector<double> distance, carried(pixels);
    for (int s = 0; s < n_slots; ++s) {
      bool any_beyond = false;
      for (std::size_t p = 0; p < pixels; ++p) {
        const std::size_t i = p * n_slots + s;
        reached[p] = !std::isnan(analogue[i]);
        carried[p] = reached[p] ? gap_variance[i] : 0.0;
        any_beyond |= beyond_reach(p, i);
      }
      if (!any_beyond) continue;
      detail::carry_nearest(rows, cols, reached, distance, carried);
      for (std::size_t p = 0; p < pixels; ++p) {
        const std::size_t i = p * n_slots + s;
        if (beyond_reach(p, i) && !std::isnan(carried[p]))
          gap_variance[i] = std::max(gap_variance[i], carried[p]);
      }
    }
  }
  std::vector<double> spatial_variance;
  if (analogue_settings.radius > 0) {
    detail::fill_by_normalised_convolution(cell_grid, completed, wanted, convolution_scales,
                                           convolution_support);
    // A convolved value is as uncertain as the difference between values this far apart: the
    // observations' semivariogram at the distance to the nearest known cell, plus that cell's
    // own variance when it is an estimate (analogue.hpp).
    spatial_variance =
        detail::interpolation_variance(cell_grid, y, weight, wanted, completed, gap_variance);
  }

  const double lo = options_.clamp_min ? *options_.clamp_min : -INFINITY;
  const double hi = options_.clamp_max ? *options_.clamp_max : INFINITY;
  for (std::size_t cp = 0; cp < core_pixels; ++cp) {
    const std::size_t p = std::size_t(in.read_pixel_of(std::int64_t(cp)));
    const int r = int(p / cols), c = int(p % cols);
    const bool fillable = reachable(r, c);
    for (int s = 0; s < n_slots; ++s) {
      const std::size_t o = cp * n_slots + s, i = p * n_slots + s;
      out.rejected[o] = rejected[i];
      if (!fillable) {
        out.fitted[o] = NAN;
        out.sd[o] = NAN;
        continue;
      }
      // Observed cells report the model and its variance (the engine keeps the observation);
      // gaps the local stages' value where they gave one.
      double fit = model_at(p, s), variance = model_variance_at(p, i);
      if (!(weight[i] > 0) && !std::isnan(completed[i])) fit = completed[i];
      if (!(weight[i] > 0) && observations[p] > 0)
        variance = gap_variance[i];
      else if (wanted[i] && !spatial_variance.empty() && !std::isnan(spatial_variance[i]))
        variance = std::max(variance, spatial_variance[i]);
      out.fitted[o] = float(std::clamp(fit, lo, hi));
      // A block with one observed cell in all has nothing to estimate a spread from: its
      // filled values had sd 0, a certainty no fill has. Unknown, as whittaker says of a series
      // too short. (A variance of 0 where the block's values are all equal stays 0.)
      const bool spread = weight[i] > 0 || (spread_known && (!one_slot || s == observed_slot));
      out.sd[o] = spread ? BlockOutput::sd_value(std::sqrt(variance)) : NAN;
    }
  }
}

std::unique_ptr<FillMethod> make_spacetime(const MethodOptions& options) {
  return std::make_unique<SpacetimeMethod>(options);
}

}  // namespace kalends
