#include "kalends/spectral_index.hpp"

#include <tbb/parallel_for.h>
#include <tbb/task_arena.h>

#include <algorithm>
#include <atomic>
#include <cctype>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <set>

#include "engine/block_runner.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"

namespace kalends {

namespace fs = std::filesystem;

float spectral_index(SpectralIndex kind, float red, float nir, float blue) {
  double numerator, denominator;
  if (kind == SpectralIndex::ndvi) {
    numerator = double(nir) - red;
    denominator = double(nir) + red;
  } else {
    numerator = 2.5 * (double(nir) - red);
    denominator = double(nir) + 6.0 * red - 7.5 * blue + 1.0;
  }
  if (!(denominator != 0) || !std::isfinite(numerator)) return NAN;
  const double v = numerator / denominator;
  // Float reflectances put an index of exactly -1 or 1 up to about 1e-6 beyond it.
  constexpr double rounding = 1e-5;
  return v >= -1.0 - rounding && v <= 1.0 + rounding ? float(std::clamp(v, -1.0, 1.0)) : NAN;
}

namespace {

constexpr int tile_size = 256;

// EVI's constants (L = 1, C1 = 6, C2 = 7.5; Huete et al. 2002, Remote Sens. Environ. 83:195-213)
// are for surface reflectance in 0..1: on digital numbers or unscaled integers (MODIS stores
// reflectance x 10000) the formula gives meaningless values, most of them outside -1..1. The
// median of a date's values over a central window tells them apart (reflectance of bright snow
// or cloud reaches about 1.2; from memory). The first date is judged over at most 512 x 512 px,
// every later one over 128 x 128 (one file of a series may lack the scale factor the rest state).
constexpr int first_date_side = 512, later_date_side = 128;

double median_of(const Stack& stack, std::size_t date) {
  return date_median(stack, date, date == 0 ? first_date_side : later_date_side);
}

void require_reflectance(const Stack& stack, const std::string& option) {
  for (std::size_t date = 0; date < stack.layers().size(); ++date) {
    const double median = median_of(stack, date);
    if (median > 1.5)  // false for NaN: nothing finite to judge by
      throw UsageError(option + " " + stack.layers()[date].path,
                       fmt::format("values (median {:g}) are not reflectances in 0..1, which EVI's constants "
                                   "assume; give --scale and the product's --offset (MODIS surface reflectance: "
                                   "--scale 0.0001; Landsat Collection 2 Level-2: --scale 0.0000275 --offset -0.2); "
                                   "digital numbers need a radiometric calibration first",
                                   median));
  }
}

// NDVI does not depend on a scale both bands share, but red and NIR on different scales (one
// file's scale factor set, the other's not) give an index of nonsense without a word. Red and
// NIR medians over a scene differ by less than about 30 times even over dense vegetation (red
// 0.02-0.04, NIR 0.3-0.5; from memory); a factor over 100 is a scale mismatch (the usual ones
// are 250 and 10000). Each date is judged: the scale can differ on one date only.
void require_same_scale(const Stack& red, const Stack& nir, const std::vector<std::size_t>& nir_of) {
  for (std::size_t date = 0; date < red.layers().size(); ++date) {
    const double r = median_of(red, date), n = date_median(nir, nir_of[date], date == 0 ? first_date_side
                                                                                          : later_date_side);
    if (!(r > 0 && n > 0)) continue;  // nothing to judge by
    const double factor = std::max(r, n) / std::min(r, n);
    // Only where one of them is not a reflectance (a median over 1.5, as EVI's check): water
    // has red near 0.03 and NIR near 0, a large factor on one scale.
    if (factor > 100 && std::max(r, n) > 1.5)
      throw UsageError("--red/--nir",
                       fmt::format("red (median {:g}, {}) and NIR (median {:g}, {}) differ {:.0f}-fold: "
                                   "they are not on one scale (a scale factor set on one band's files "
                                   "only?); NDVI needs both in the same units",
                                   r, red.layers()[date].path, n, nir.layers()[nir_of[date]].path, factor));
  }
}

}  // namespace

void check_index_options(const IndexRequest& request) {
  if (request.out_dir.empty()) throw UsageError("--out", "an output folder is required");
  if (request.red.empty() || request.nir.empty()) throw UsageError("--red/--nir", "both are required");
  if (request.kind == SpectralIndex::evi && request.blue.empty()) throw UsageError("--blue", "EVI needs the blue band");
  check_band(request.red_band, "--red-band");
  check_band(request.nir_band, "--nir-band");
  check_band(request.blue_band, "--blue-band");
  check_band(request.qa_band, "--qa-band");
  // The same band twice gives an index of 0 (or a ratio of a band with itself) everywhere.
  auto same = [](const std::string& a, int band_a, const std::string& b, int band_b) {
    return a == b && band_a == band_b;
  };
  if (same(request.red, request.red_band, request.nir, request.nir_band))
    throw UsageError("--nir-band", fmt::format("reads the same band as --red ({} band {}); give each its own band",
                                               request.red, request.red_band));
  if (request.kind == SpectralIndex::evi &&
      (same(request.blue, request.blue_band, request.red, request.red_band) ||
       same(request.blue, request.blue_band, request.nir, request.nir_band)))
    throw UsageError("--blue-band", fmt::format("reads the same band as --red or --nir ({} band {})", request.blue,
                                                request.blue_band));
}

IndexSummary run_index(const IndexRequest& request) {
  detail::start_gdal();
  check_index_options(request);
  detail::require_plain_name(request.name);
  const bool evi = request.kind == SpectralIndex::evi;
  auto rules_for = [&](int band, const char* role) {
    const auto own = request.rules_of.find(role);
    ValueRules r = own != request.rules_of.end() ? own->second : request.rules;
    r.band = band;
    r.one_date_per_file = true;
    return r;
  };
  // One file holding a band per date (a NetCDF time axis) had been read as one scene, band 1:
  // the other dates were dropped without a word. Where the band was not given and the input is
  // one name, it is read date by date when its bands carry dates.
  auto open_role = [&](const std::string& input, int band, bool given, const char* role) {
    if (!given && input.find_first_of("*?[") == std::string::npos) {
      ValueRules by_date = rules_for(band, role);
      by_date.one_date_per_file = false;
      try {
        Stack dated = Stack::open(input, by_date);
        if (dated.layers().size() > 1) return dated;
      } catch (const Error&) {
        // No dated bands (a multi-band scene with its date in the name): one date, band 1.
      }
    }
    return Stack::open(input, rules_for(band, role));
  };
  const Stack red = open_role(request.red, request.red_band, request.red_band_given, "red");
  const Stack nir = open_role(request.nir, request.nir_band, request.nir_band_given, "nir");
  const std::vector<std::size_t> nir_of = partners_by_date(red, nir, "near-infrared");
  // And the other way round: a near-infrared (or blue) date without its red had been left out
  // without a word.
  partners_by_date(nir, red, "red");
  require_same_scale(red, nir, nir_of);
  std::optional<Stack> blue;
  std::vector<std::size_t> blue_of;
  if (evi) {
    blue = open_role(request.blue, request.blue_band, request.blue_band_given, "blue");
    blue_of = partners_by_date(red, *blue, "blue");
    partners_by_date(*blue, red, "red");
    require_reflectance(red, "--red");
    require_reflectance(nir, "--nir");
    require_reflectance(*blue, "--blue");
  }
  std::vector<std::string> notes;
  if (!evi) {
    // NDVI ignores a scale both bands share, but not an offset or a gain of each band's own
    // (digital numbers, or Landsat Collection 2's x 0.0000275 - 0.2): on such values it is
    // another number (a helper measured NDVI 0.20 on Collection-2-style stored values against
    // 0.39 on their reflectance). Values above 1.5 are no reflectances (as EVI's check).
    const double r = median_of(red, 0), n = median_of(nir, 0);
    if (r > 1.5 && n > 1.5)
      notes.push_back(fmt::format(
          "the red and near-infrared values (medians {:g} and {:g} on the first date) are not reflectances: "
          "NDVI is right only where they are proportional to reflectance; give --scale and the product's "
          "--offset where it has one (Landsat Collection 2 Level-2: --scale 0.0000275 --offset -0.2)",
          r, n));
  }
  std::optional<Stack> qa;
  std::vector<std::size_t> qa_of;
  if (!request.qa.empty()) {
    ValueRules qa_rules;
    qa_rules.band = request.qa_band;  // a job input's qa_band had been ignored: band 1 taken as QA
    qa = Stack::open(request.qa, qa_rules);
    qa_of = partners_by_date(red, *qa, "QA");
  }
  const std::string name = request.name.empty() ? (evi ? "evi" : "ndvi") : request.name;
  // Among the band files, the index would be read back as one of them by the next run.
  detail::require_out_apart_from(red, request.out_dir, "red");
  detail::require_out_apart_from(nir, request.out_dir, "near-infrared");
  if (blue) detail::require_out_apart_from(*blue, request.out_dir, "blue");
  if (qa) detail::require_out_apart_from(*qa, request.out_dir, "QA");
  if (request.check_only) return {};
  std::error_code ec;
  const detail::OutputFolder output_folder(request.out_dir);  // removed again if the run fails before writing

  std::vector<detail::OutputSpec> specs;
  for (const Layer& layer : red.layers()) {
    detail::OutputSpec spec;
    spec.path = (fs::path(request.out_dir) / (name + "_" + layer.time.label() + ".tif")).string();
    spec.metadata = {{"KALENDS_VERSION", KALENDS_VERSION},
                     {"KALENDS_INDEX", evi ? "EVI = 2.5 (NIR - red) / (NIR + 6 red - 7.5 blue + 1)"
                                           : "NDVI = (NIR - red) / (NIR + red)"},
                     {"KALENDS_DATE", layer.time.iso()},
                     {"KALENDS_RED", layer.path + " band " + std::to_string(layer.band)}};
    if (!request.command_line.empty()) spec.metadata["KALENDS_COMMAND"] = request.command_line;
    spec.bands = {{name, "", {}}};
    specs.push_back(std::move(spec));
  }
  const Grid& grid = red.grid();
  const Window area = area_of(grid.width, grid.height, request.region, request.red);
  const detail::GdalCacheScope cache(64 << 20);
  detail::OutputSet outputs(std::move(specs), window_grid(grid, area), request.compression, tile_size);
  outputs.set_origin(area.x, area.y);
  std::atomic<std::int64_t> missing{0};
  const int threads = request.threads > 0 ? request.threads : tbb::this_task_arena::max_concurrency();
  tbb::task_arena arena(detail::arena_threads(threads));
  arena.execute([&] {
    tbb::parallel_for(std::size_t(0), red.layers().size(), [&](std::size_t i) {
      auto red_reader = red.reader(), nir_reader = nir.reader();
      std::unique_ptr<StackReader> blue_reader = blue ? blue->reader() : nullptr;
      std::vector<float> r, n, b, out, scratch;
      std::int64_t local_missing = 0;
      for (int y = area.y; y < area.y + area.height; y += tile_size) {
        const Window w{area.x, y, area.width, std::min(tile_size, area.y + area.height - y)};
        r.resize(w.pixels()), n.resize(w.pixels()), out.resize(w.pixels());
        red_reader->read_values(i, w, r.data());
        nir_reader->read_values(nir_of[i], w, n.data());
        if (blue_reader) {
          b.resize(w.pixels());
          blue_reader->read_values(blue_of[i], w, b.data());
        }
        for (std::int64_t p = 0; p < w.pixels(); ++p) {
          out[p] = spectral_index(request.kind, r[p], n[p], blue_reader ? b[p] : 0.0f);
          local_missing += std::isnan(out[p]);
        }
        const float* planes[] = {out.data()};
        outputs.write(i, w, planes, scratch);
      }
      missing += local_missing;
    });
  });
  outputs.set_keep_unchanged(request.keep_unchanged);
  outputs.commit();
  // QA layers travel with the index so that `kalends fill --qa` finds them by date; they count
  // among the outputs written or unchanged.
  int qa_written = 0, qa_unchanged = 0;
  std::vector<std::string> made = outputs.paths();
  if (qa) {
    const fs::path qa_dir = fs::path(request.out_dir) / "qa";
    fs::create_directories(qa_dir, ec);
    if (ec) throw OutputError(qa_dir.string(), "cannot create the folder: " + ec.message());
    // A QA file of one band is copied as it is; a date's band of a multi-band file or container
    // (a band per date) is written alone: the whole file had been copied for each date, and
    // `fill --qa` then read its first band as the QA of every date.
    std::set<std::string> paths;
    bool plain_files = true;
    for (const Layer& q : qa->layers()) {
      std::error_code ignored;
      // A GeoTIFF alone: a VRT copied elsewhere loses its relative sources.
      std::string extension = fs::path(q.path).extension().string();
      std::transform(extension.begin(), extension.end(), extension.begin(), [](unsigned char c) { return std::tolower(c); });
      plain_files = plain_files && q.band == 1 && paths.insert(q.path).second && fs::is_regular_file(q.path, ignored) &&
                    (extension == ".tif" || extension == ".tiff");
    }
    for (std::size_t i = 0; i < red.layers().size(); ++i) {
      const Layer& q = qa->layers()[qa_of[i]];
      const std::string extension = plain_files ? fs::path(q.path).extension().string() : std::string(".tif");
      const fs::path target = qa_dir / ("qa_" + red.layers()[i].time.label() + extension);
      const std::string temporary = detail::temporary_name(target.string());
      made.push_back(target.string());
      if (request.region || !plain_files) {
        // A region's QA is the same window of the QA layer, so that it lines up with the index.
        detail::crop_raster(q.path, area, temporary, plain_files ? 0 : q.band);
        if (fs::exists(target) && detail::same_raster_content(target.string(), temporary)) {
          fs::remove(temporary, ec);
          ++qa_unchanged;
          continue;
        }
      } else {
        if (fs::exists(target) && fs::file_size(target) == fs::file_size(q.path) &&
            detail::file_checksum_equal(target.string(), q.path)) {
          ++qa_unchanged;  // already there: keep its bytes and time
          continue;
        }
        fs::copy_file(q.path, temporary, fs::copy_options::overwrite_existing, ec);
        if (ec) throw OutputError(target.string(), "cannot copy the QA layer: " + ec.message());
      }
      fs::rename(temporary, target, ec);
      if (ec) throw OutputError(target.string(), "cannot rename into place: " + ec.message());
      ++qa_written;
    }
  }
  IndexSummary summary;
  summary.outputs_written = outputs.written() + qa_written;
  summary.outputs_unchanged = outputs.unchanged() + qa_unchanged;
  summary.outputs = made;
  summary.dates = int(red.layers().size());
  summary.pixels = area.pixels() * summary.dates;
  summary.missing = missing;
  summary.out_dir = request.out_dir;
  summary.notes = notes;
  return summary;
}

}  // namespace kalends
