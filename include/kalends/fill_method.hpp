// The interface every gap-filling method implements. A method sees one block of a regular time
// grid with weights and returns values, sd and flags; it knows nothing of files.
#pragma once

#include <cmath>
#include <cstdint>
#include <limits>
#include <map>
#include <memory>
#include <optional>
#include <span>
#include <string>
#include <vector>

#include "kalends/block_plan.hpp"
#include "kalends/time_grid.hpp"

namespace kalends {

/// Flags written with every value.
enum class Flag : std::uint8_t {
  observed = 0,    // observed and kept
  rejected = 1,    // observed but rejected as an outlier
  filled = 2,      // no usable observation: value from the fit
  unfilled = 3,    // could not be filled: value is NaN
};

/// A block handed to a method. Series are pixel-major: series(p)[slot].
struct BlockInput {
  const TimeGrid* grid = nullptr;
  Window read;   // the pixels present (core plus halo)
  Window core;   // the pixels whose results are wanted
  std::span<const float> values;   // read.pixels() * grid->size; NaN where nothing observed
  std::span<const float> weights;  // same shape; 0 where nothing observed
  std::span<const float> series(std::int64_t pixel) const {
    return values.subspan(pixel * grid->size, grid->size);
  }
  std::span<const float> series_weights(std::int64_t pixel) const {
    return weights.subspan(pixel * grid->size, grid->size);
  }
  /// The read pixel of a core pixel (each row-major in its own window).
  std::int64_t read_pixel_of(std::int64_t core_pixel) const {
    const std::int64_t cy = core_pixel / core.width, cx = core_pixel % core.width;
    return (cy + core.y - read.y) * read.width + (cx + core.x - read.x);
  }
};

/// Results for the core pixels, pixel-major like the input.
struct BlockOutput {
  std::vector<float> fitted;            // the curve at every slot (NaN where not fillable)
  std::vector<float> sd;                // its standard error
  std::vector<std::uint8_t> rejected;   // 1 where an observation was rejected as an outlier
  // Parameters the method chose for this block from its data (smoothing by GCV, say), by name;
  // the engine lists them per block in fill-summary.json.
  std::map<std::string, double> chosen;
  // Core pixels with observations that the method could not fit, by the reason it gives (a
  // sentence a user can act on); the engine sums them for the summary.
  std::map<std::string, std::int64_t> not_fitted;
  /// One core pixel's results, `slots` long.
  struct Series {
    std::span<float> fitted, sd;
    std::span<std::uint8_t> rejected;
  };
  Series series(std::int64_t core_pixel, int slots) {
    const std::size_t at = std::size_t(core_pixel) * std::size_t(slots), n = std::size_t(slots);
    return {std::span(fitted).subspan(at, n), std::span(sd).subspan(at, n),
            std::span(rejected).subspan(at, n)};
  }
  /// An sd as stored: one past float's range (a tiny smoothing, values near 1e38) is not known
  /// to any use, so NaN ("unknown") rather than infinite, which no reader could use either.
  static float sd_value(double sd) { return sd <= double(std::numeric_limits<float>::max()) ? float(sd) : NAN; }
  // NaN until the method writes them: a pixel a method leaves alone is not filled (flag 3),
  // where zeros had been written as filled values of 0 with sd 0.
  void resize(std::size_t n) {
    fitted.assign(n, NAN);
    sd.assign(n, NAN);
    rejected.assign(n, 0);
    chosen.clear();
    not_fitted.clear();
  }
};

/// The engine's check of a method's output for a block of `cells` cells (core pixels x slots):
/// std::logic_error naming the method where an array has another size or an sd is negative or
/// infinite. A method's own tests can call it too.
class FillMethod;
void check_block_output(const FillMethod& method, const BlockOutput& out, std::size_t cells);

/// Parameters as text, written into output metadata.
using MethodParameters = std::map<std::string, std::string>;
/// "key=value key=value", as in fill-summary.json, the outputs' metadata and validate's report.
std::string join_parameters(const MethodParameters& parameters);

class FillMethod {
 public:
  virtual ~FillMethod() = default;
  virtual std::string name() const = 0;
  virtual MethodParameters parameters() const = 0;
  /// Pixels of context needed on each side (0 for methods that look at one pixel at a time).
  virtual int halo() const { return 0; }
  /// Scratch bytes a method needs per read pixel, beyond the block's own buffers (for the
  /// memory budget).
  virtual std::size_t scratch_bytes_per_pixel(const TimeGrid&) const { return 0; }
  /// Fills `out` (already sized to core.pixels() * grid.size). Must be safe to call from
  /// several threads at once on different blocks.
  virtual void fill(const BlockInput& in, BlockOutput& out) const = 0;
};

/// Options shared by the command line and the job file; each method reads what it needs.
struct MethodOptions {
  std::string method = "whittaker";
  // whittaker
  std::optional<double> lambda;  // unset = chosen per pixel by GCV
  int order = 2;
  double lambda_min = 1e-2, lambda_max = 1e6;
  bool envelope_upper = false;
  bool robust = false;
  int iterations = 4;
  // harmonic
  int harmonics = 3;
  bool trend = false;
  double reject_below = 2.0;  // residual sd units
  int min_observations_per_coefficient = 2;
  // spacetime (smoothing of the DCT-PLS fits: anomaly in space / time, climatology in space /
  // across season bins; see src/fill/spacetime.hpp)
  // unset = chosen per block by generalised cross-validation (src/fill/pls_gcv.hpp)
  std::optional<double> spacetime_space_smoothing = 3.0;
  std::optional<double> spacetime_time_smoothing = 0.3;
  double spacetime_climate_smoothing = 3.0;
  double spacetime_season_smoothing = 1.0;
  int spacetime_halo = 32;              // pixels of context on each side of a block
  int spacetime_neighbour_radius = 6;   // analogue neighbours; 0 = the smooth model alone
  // Relative residual of the conjugate-gradient solves; their coarse-grid starts are solved to
  // a tenth of it (detail::PlsSettings). At 1e-4 with those starts a 512 x 512 x 46 stack in 4
  // blocks and in 1 differs by up to 0.001 (the limit is 0.004); without them
  // (version 0.3.4) the smoothest components of a large block were the last to settle and
  // needed 1e-5 (0.0021; 0.023 at 1e-4).
  double spacetime_tolerance = 1e-4;
  // FFTW planning: "auto" times the transforms once per shape and keeps the result in the user
  // cache (see detail::default_wisdom_file), a path keeps it there, "none" plans by estimate.
  std::string spacetime_fft_wisdom = "auto";
  // temporal methods
  double max_gap_days = 0;             // longer gaps stay unfilled; 0 = no limit
  double max_extrapolation_days = 32;  // past the first/last observation; < 0 = no limit
  // > 0: each calendar year is filled from the dates within this many days of it, so a new
  // date changes only the years it reaches (whittaker, harmonic); 0 = the whole series at once.
  double reach_days = 0;
  // Pixels with no observation on any date of the stack: a method with a halo (spacetime)
  // fills them from their neighbours; false leaves them empty (flag 3), for sea, lakes or
  // the area outside a boundary, which a stack never observes.
  bool fill_never_observed = true;
  std::optional<double> clamp_min, clamp_max;
};

/// The registry: one line per method in registry.cpp. Throws UsageError for unknown names or
/// options out of range.
std::unique_ptr<FillMethod> make_fill_method(const MethodOptions& options);
std::vector<std::string> fill_method_names();
/// UsageError naming the option (as --option) when one of `given` (job keys: "harmonics",
/// "space_smoothing") is read by none of `methods`: it would be silently ignored. A name among
/// `methods` that is no method is refused first, naming `methods_option`.
void check_options_apply(const std::vector<std::string>& methods, const std::vector<std::string>& given,
                         const std::string& methods_option = "--method");

}  // namespace kalends
