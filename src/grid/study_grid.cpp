// kalends grid: layers onto the analyst's grid with GDAL's warper (gdalwarp's library form,
// GDALWarp), then written by GDAL's COG driver. Area-weighted means come from the warper's
// "average" resampling, which weights each source cell by the share of it inside the target
// cell and skips cells without data (GDAL documentation, gdalwarp -r average).
#include "kalends/study_grid.hpp"

#include <cpl_string.h>
#include <gdal_alg.h>
#include <gdal_utils.h>
#include <gdal_priv.h>
#include <ogr_spatialref.h>
#include <ogrsf_frmts.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <fmt/ranges.h>
#include <map>
#include <memory>
#include <set>
#include <tuple>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"

namespace kalends {

namespace fs = std::filesystem;

namespace {

using DatasetPtr = GDALDatasetUniquePtr;

struct Source {
  std::string path, relative;  // relative: the output's name below out_dir
};

// The rasters of the inputs; a folder is searched below, except for the output folder (which
// may lie inside it: the next run would grid its own outputs again, one level deeper).
std::vector<Source> sources_of(const std::vector<std::string>& inputs, const std::string& out_dir) {
  std::vector<Source> sources;
  std::error_code ec;
  const fs::path out = fs::weakly_canonical(out_dir, ec);
  for (const std::string& input : inputs) {
    if (fs::is_directory(input)) {
      std::vector<Source> found;
      for (auto it = fs::recursive_directory_iterator(input); it != fs::recursive_directory_iterator(); detail::walk_on(it)) {
        const std::string name = it->path().filename().string();
        if (name == half_published_marker) require_not_half_published(it->path().parent_path().string());
        if (name.front() == '.' || (it->is_directory() && fs::weakly_canonical(it->path(), ec) == out)) {
          if (it->is_directory()) it.disable_recursion_pending();
          continue;
        }
        const std::string ext = it->path().extension().string();
        if (it->is_regular_file() && (ext == ".tif" || ext == ".vrt"))
          found.push_back({it->path().string(), it->path().lexically_relative(input).replace_extension(".tif").string()});
      }
      std::sort(found.begin(), found.end(), [](const Source& a, const Source& b) { return a.relative < b.relative; });
      if (found.empty()) throw InputError(input, "holds no raster (.tif or .vrt)");
      sources.insert(sources.end(), found.begin(), found.end());
    } else if (detail::has_glob_characters(input)) {
      for (const std::string& path : detail::expand_glob(input))
        sources.push_back({path, fs::path(path).filename().replace_extension(".tif").string()});
    } else if (const auto parts = detail::connection_parts(input); parts && !fs::exists(input)) {
      // One variable of a container file, 'NETCDF:"f.nc":tas': written as f_tas.tif.
      if (!fs::exists(parts->files)) throw InputError(parts->files, "no such file");
      const std::string variable = parts->variable();
      sources.push_back({input, fs::path(parts->files).stem().string() + (variable.empty() ? "" : "_" + variable) +
                                    ".tif"});
    } else {
      if (!fs::exists(input)) throw InputError(input, "no such file or folder");
      sources.push_back({input, fs::path(input).filename().replace_extension(".tif").string()});
    }
  }
  return sources;
}

// Runs GDALWarp on `source` into an in-memory dataset with `args` (gdalwarp's options).
DatasetPtr warp(GDALDataset& source, const std::vector<std::string>& args, const std::string& where) {
  CPLStringList list;
  for (const std::string& a : args) list.AddString(a.c_str());
  GDALWarpAppOptions* options = GDALWarpAppOptionsNew(list.List(), nullptr);
  if (!options) throw UsageError(where, "GDAL refused the warp options (" + detail::gdal_message("?") + ")");
  GDALDatasetH handle = GDALDataset::ToHandle(&source);
  int usage_error = 0;
  CPLErrorReset();
  GDALDatasetH out = GDALWarp("", nullptr, 1, &handle, options, &usage_error);
  GDALWarpAppOptionsFree(options);
  if (!out || usage_error)
    throw InputError(where, "cannot warp (" + detail::gdal_message("unknown reason") + ")");
  return DatasetPtr(GDALDataset::FromHandle(out));
}

// An in-memory view of some bands of `source` (gdal_translate -of VRT -b ...).
DatasetPtr band_subset(GDALDataset& source, const std::vector<int>& bands, const std::string& where) {
  CPLStringList list;
  list.AddString("-of");
  list.AddString("VRT");
  for (int b : bands) {
    list.AddString("-b");
    list.AddString(std::to_string(b).c_str());
  }
  GDALTranslateOptions* options = GDALTranslateOptionsNew(list.List(), nullptr);
  int failed = 0;
  GDALDatasetH out = GDALTranslate("", GDALDataset::ToHandle(&source), options, &failed);
  GDALTranslateOptionsFree(options);
  if (!out || failed) throw InputError(where, "cannot select bands (" + detail::gdal_message("?") + ")");
  return DatasetPtr(GDALDataset::FromHandle(out));
}

// How a band is carried to the study grid.
enum class BandKind {
  continuous,   // --resample (area-weighted mean by default)
  classes,      // mode: a class is not averaged
  flag,         // kalends' flag band: mode over the cells with a value (flags 0-2), else 3
  day_of_year,  // circular mean: days 360 and 5 average to about 1, not 182
};

BandKind kind_of(GDALRasterBand& band) {
  const std::string d = band.GetDescription();
  if (d == "flag") return BandKind::flag;
  if (d.size() > 4 && d.ends_with("_doy")) return BandKind::day_of_year;
  // Counts of seasons, and any band that says what its classes mean (CF's flag_meanings as
  // GDAL reports it from NetCDF, kalends' CLASS_MEANINGS).
  if (d == "seasons" || band.GetMetadataItem("CLASS_MEANINGS") || band.GetMetadataItem("FLAG_MEANINGS") ||
      band.GetMetadataItem("flag_meanings") || band.GetMetadataItem("flag_values"))
    return BandKind::classes;
  return BandKind::continuous;
}

// A one-band in-memory copy of `band` of `in`, each value mapped by `map` (NaN = no data).
template <class Map>
DatasetPtr mapped_band(GDALDataset& in, int band, Map map, const std::string& where) {
  GDALDriver* mem = GetGDALDriverManager()->GetDriverByName("MEM");
  DatasetPtr out(mem->Create("", in.GetRasterXSize(), in.GetRasterYSize(), 1, GDT_Float32, nullptr));
  if (!out) throw OutputError(where, "out of memory for a derived band");
  double gt[6];
  if (in.GetGeoTransform(gt) == CE_None) out->SetGeoTransform(gt);
  out->SetProjection(in.GetProjectionRef());
  GDALRasterBand* from = in.GetRasterBand(band);
  int has_nodata = 0;
  const double nodata = from->GetNoDataValue(&has_nodata);
  const double scale = from->GetScale(), offset = from->GetOffset();  // to the physical value
  std::vector<float> row(std::size_t(in.GetRasterXSize()));
  for (int y = 0; y < in.GetRasterYSize(); ++y) {
    if (!detail::read_stored_values(*from, 0, y, int(row.size()), 1, row.data(), GDT_Float32))
      throw InputError(where, fmt::format("cannot read band {} ({})", band, detail::gdal_message("?")));
    for (float& v : row)
      v = (has_nodata && v == float(nodata)) || std::isnan(v) ? NAN : map(float(v * scale + offset));
    if (out->GetRasterBand(1)->RasterIO(GF_Write, 0, y, int(row.size()), 1, row.data(), int(row.size()), 1,
                                        GDT_Float32, 0, 0) != CE_None)
      throw OutputError(where, "out of memory for a derived band");
  }
  out->GetRasterBand(1)->SetNoDataValue(NAN);
  return out;
}

// A one-band in-memory raster on the grid of `like` holding `plane`.
DatasetPtr plane_dataset(GDALDataset& like, std::vector<float>& plane, const std::string& where) {
  const int width = like.GetRasterXSize(), height = like.GetRasterYSize();
  GDALDriver* mem = GetGDALDriverManager()->GetDriverByName("MEM");
  DatasetPtr out(mem->Create("", width, height, 1, GDT_Float32, nullptr));
  double gt[6];
  like.GetGeoTransform(gt);
  out->SetGeoTransform(gt);
  out->SetProjection(like.GetProjectionRef());
  if (out->GetRasterBand(1)->RasterIO(GF_Write, 0, 0, width, height, plane.data(), width, height, GDT_Float32, 0, 0) !=
      CE_None)
    throw OutputError(where, "out of memory for a derived band");
  out->GetRasterBand(1)->SetNoDataValue(NAN);
  return out;
}

// A one-band in-memory raster on the grid of `like`, each cell combine(a, b) of two warped bands.
template <class Combine>
DatasetPtr combined_band(GDALDataset& like, GDALRasterBand& a, GDALRasterBand& b, Combine combine,
                         const std::string& where) {
  const int width = like.GetRasterXSize(), height = like.GetRasterYSize();
  std::vector<float> pa(std::size_t(width) * height), pb(pa.size());
  if (a.RasterIO(GF_Read, 0, 0, width, height, pa.data(), width, height, GDT_Float32, 0, 0) != CE_None ||
      b.RasterIO(GF_Read, 0, 0, width, height, pb.data(), width, height, GDT_Float32, 0, 0) != CE_None)
    throw OutputError(where, "cannot read the warped bands");
  for (std::size_t i = 0; i < pa.size(); ++i) pa[i] = combine(pa[i], pb[i]);
  return plane_dataset(like, pa, where);
}

constexpr double days_per_year = 365.25;
constexpr double two_pi = 6.283185307179586;

// A layer that crosses the antimeridian in a geographic study CRS, gridded to the extent GDAL
// suggests, came out as one row around the whole globe (35879 x 1 cells, 22 with a value) and
// was reported as written. Its edges are sampled into the study CRS: longitudes spanning more
// than 180 degrees that would span less once shifted by 360 cross the line. A global layer
// spans 360 either way and is not refused.
void require_not_across_antimeridian(const Grid& grid, const std::string& crs, const std::string& where) {
  OGRSpatialReference target, source;
  if (target.SetFromUserInput(crs.c_str()) != OGRERR_NONE || !target.IsGeographic() ||
      source.importFromWkt(grid.crs_wkt.c_str()) != OGRERR_NONE)
    return;
  target.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
  source.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
  const std::unique_ptr<OGRCoordinateTransformation> to(OGRCreateCoordinateTransformation(&source, &target));
  if (!to) return;
  std::vector<double> x, y;
  const auto& g = grid.geotransform;
  constexpr int steps = 32;
  for (int k = 0; k <= steps; ++k) {
    const double f = double(k) / steps;
    for (const auto& [column, row] : {std::pair{f * grid.width, 0.0}, std::pair{f * grid.width, double(grid.height)},
                                      std::pair{0.0, f * grid.height}, std::pair{double(grid.width), f * grid.height}}) {
      x.push_back(g[0] + column * g[1] + row * g[2]);
      y.push_back(g[3] + column * g[4] + row * g[5]);
    }
  }
  std::vector<int> ok(x.size());
  to->Transform(int(x.size()), x.data(), y.data(), nullptr, ok.data());
  double low = 1e9, high = -1e9, shifted_low = 1e9, shifted_high = -1e9;
  for (std::size_t k = 0; k < x.size(); ++k) {
    if (!ok[k] || !std::isfinite(x[k])) continue;
    const double shifted = x[k] < 0 ? x[k] + 360 : x[k];
    low = std::min(low, x[k]), high = std::max(high, x[k]);
    shifted_low = std::min(shifted_low, shifted), shifted_high = std::max(shifted_high, shifted);
  }
  if (high - low > 180 && shifted_high - shifted_low < 180)
    throw InputError(where, fmt::format("crosses the antimeridian (longitudes {:.2f} to {:.2f} across 180): give "
                                        "--extent, whose longitudes may run past 180 (e.g. {:.1f},...,{:.1f},...)",
                                        shifted_low > 180 ? shifted_low - 360 : shifted_low,
                                        shifted_high > 180 ? shifted_high - 360 : shifted_high,
                                        std::floor(shifted_low), std::ceil(shifted_high)));
}

// Whether every band of the file at `path` reads back without error (its overviews too).
bool readable_whole(const std::string& path) {
  CPLErrorReset();
  GDALDatasetUniquePtr d(GDALDataset::Open(path.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  if (!d) return false;
  for (int b = 1; b <= d->GetRasterCount(); ++b) {
    GDALRasterBand* band = d->GetRasterBand(b);
    GDALChecksumImage(band, 0, 0, band->GetXSize(), band->GetYSize());
    for (int o = 0; o < band->GetOverviewCount(); ++o) {
      GDALRasterBand* overview = band->GetOverview(o);
      GDALChecksumImage(overview, 0, 0, overview->GetXSize(), overview->GetYSize());
    }
  }
  return CPLGetLastErrorType() != CE_Failure;
}

}  // namespace

const std::vector<std::string>& study_grid_resampling_names() {
  static const std::vector<std::string> names{"average", "nearest", "bilinear", "cubic", "cubicspline", "lanczos",
                                              "min",     "max",     "med",      "mode",  "sum",         "rms"};
  return names;
}

void check_study_grid_options(const StudyGridRequest& request) {
  detail::start_gdal();
  if (request.crs.empty()) throw UsageError("--crs", "the study grid needs a CRS, e.g. EPSG:4326");
  {
    OGRSpatialReference srs;
    detail::set_crs_from_user(srs, request.crs, "--crs");
    // An extent is in the --crs's units: metres given for a geographic CRS would be a grid
    // beside the earth.
    if (srs.IsGeographic() && request.extent && request.extent->size() == 4) {
      const auto& e = *request.extent;
      for (double latitude : {e[1], e[3]})
        if (std::abs(latitude) > 90)
          throw UsageError("--extent", fmt::format("latitude {:g} is beyond ±90 degrees: give the extent in the units of "
                                                   "--crs '{}' (degrees, as XMIN,YMIN,XMAX,YMAX = west,south,east,north)",
                                                   latitude, request.crs));
      for (double longitude : {e[0], e[2]})
        if (longitude < -180 || longitude > 360)
          throw UsageError("--extent", fmt::format("longitude {:g} is beyond -180 to 360 degrees: give the extent in "
                                                   "the units of --crs '{}'", longitude, request.crs));
    }
  }
  if (request.resolution && !(*request.resolution > 0 && std::isfinite(*request.resolution)))
    throw UsageError("--resolution", "must be positive");
  if (request.extent && (request.extent->size() != 4 || !((*request.extent)[0] < (*request.extent)[2]) ||
                         !((*request.extent)[1] < (*request.extent)[3])))
    throw UsageError("--extent", "expected XMIN,YMIN,XMAX,YMAX with XMIN < XMAX and YMIN < YMAX");
  // Degrees given for a projected CRS, say: an extent narrower than one cell.
  if (request.extent && request.resolution &&
      ((*request.extent)[2] - (*request.extent)[0] < *request.resolution ||
       (*request.extent)[3] - (*request.extent)[1] < *request.resolution))
    throw UsageError("--extent", fmt::format("is narrower than one cell of --resolution {:g}: are both in the units of "
                                             "--crs '{}' (metres for a projected CRS, degrees for a geographic one)?",
                                             *request.resolution, request.crs));
  const auto& names = study_grid_resampling_names();
  if (std::find(names.begin(), names.end(), request.resample) == names.end())
    throw UsageError("--resample '" + request.resample + "'", "expected one of " + fmt::format("{}", fmt::join(names, ", ")));
}

StudyGridSummary run_study_grid(const StudyGridRequest& request) {
  check_study_grid_options(request);
  if (!request.clip.empty()) {
    if (!fs::exists(request.clip) && request.clip.find(':') == std::string::npos)
      throw InputError(request.clip, "no such file");
    GDALDatasetUniquePtr vector(GDALDataset::Open(request.clip.c_str(), GDAL_OF_VECTOR | GDAL_OF_READONLY));
    if (!vector || vector->GetLayerCount() == 0)
      throw InputError(request.clip, "cannot be read as a vector source with a layer (" +
                                         detail::gdal_message("no layer") + ")");
    if (vector->GetLayer(0)->GetFeatureCount() == 0) throw InputError(request.clip, "holds no feature to clip to");
    // The warper takes polygons only, and its own message named the first layer, not the clip
    // ("Cutline not of polygon type"): every feature is looked at here.
    OGRLayer* layer = vector->GetLayer(0);
    layer->ResetReading();
    for (OGRFeatureUniquePtr feature(layer->GetNextFeature()); feature; feature.reset(layer->GetNextFeature())) {
      const OGRGeometry* geometry = feature->GetGeometryRef();
      const OGRwkbGeometryType type = geometry ? wkbFlatten(geometry->getGeometryType()) : wkbNone;
      if (type != wkbPolygon && type != wkbMultiPolygon)
        throw InputError(request.clip, fmt::format("feature {} holds {}, not a polygon: a clip needs the study area's "
                                                   "outline, as polygons only",
                                                   feature->GetFID(),
                                                   geometry ? std::string("a ") + OGRGeometryTypeToName(type) + " geometry"
                                                            : std::string("no geometry")));
    }
  }
  const std::vector<Source> sources = sources_of(request.inputs, request.out_dir);
  // An output under an input's own path (--out the input folder): it would replace the raster
  // it is made from.
  {
    std::error_code ec;
    std::set<fs::path> inputs;
    for (const Source& s : sources) inputs.insert(fs::weakly_canonical(detail::file_in_connection(s.path), ec));
    for (const Source& s : sources)
      if (inputs.count(fs::weakly_canonical(fs::path(request.out_dir) / s.relative, ec)))
        throw UsageError("--out '" + request.out_dir + "'", "would write " + s.relative + " over the input it is made "
                                                                "from: give another folder");
  }
  // Two inputs under one output name (the same file name in two folders given): the second
  // would replace the first's output. Refused before anything is written.
  {
    std::map<std::string, std::string> by_name;
    for (const Source& s : sources)
      if (const auto [it, added] = by_name.emplace(s.relative, s.path); !added)
        throw UsageError(s.path, it->second == s.path
                                     ? std::string("is given twice")
                                     : fmt::format("would be written as '{}', as '{}' is: grid the two folders into "
                                                   "separate --out folders, or give their parent folder",
                                                   s.relative, it->second));
  }
  // Every input is opened before anything is written: a bad one leaves the outputs as they were.
  StudyGridSummary summary;
  std::vector<DatasetPtr> datasets;
  std::vector<std::string> source_crs;  // "" where the file states its own; a CRS kalends reads otherwise
  std::set<std::string> cautions;
  for (const Source& s : sources) {
    datasets.push_back(detail::open_raster(s.path));
    GDALDataset& d = *datasets.back();
    const Grid grid = detail::raster_grid(d);
    // Without a place, the warper had put the layer wherever the numbers fell in the study CRS
    // (any UTM zone took it), or failed with an allocation message.
    // Ground control points place a raster too (the warper fits a transform to them).
    const bool by_points = d.GetGCPCount() > 0 && d.GetGCPSpatialRef() != nullptr;
    if (!grid.has_geotransform && !by_points)
      throw InputError(s.path, "has no georeferencing (no geotransform): it cannot be placed on a study grid");
    if (grid.crs_wkt.empty() && !by_points)
      throw InputError(s.path, "states no CRS: it cannot be placed on a study grid (give the file its CRS with "
                               "gdal_edit.py -a_srs, the EPSG code of the CRS it was made in)");
    if (!request.extent && grid.has_geotransform) require_not_across_antimeridian(grid, request.crs, s.path);
    // A CF NetCDF with longitude/latitude axes and no CRS: WGS 84, as every command reads it.
    source_crs.push_back(d.GetSpatialRef() || by_points ? std::string() : grid.crs_wkt);
    if (const char* caution = d.GetMetadataItem("KALENDS_CAUTION")) cautions.insert(caution);
  }
  for (const std::string& c : cautions) summary.caution += (summary.caution.empty() ? "" : "\n") + c;
  // An output replaces only an earlier kalends output (grid's carry KALENDS_GRID_SOURCE): a
  // user's raster under an output's name would be lost.
  for (const Source& s : sources)
    detail::require_own_raster((fs::path(request.out_dir) / s.relative).string(),
                               {"KALENDS_VERSION", "KALENDS_GRID_SOURCE"});

  // INIT_DEST: cells no source cell reaches are nodata, not the 0 a new MEM raster holds (an
  // extent beside the data had come out as a field of zeros).
  // -ovr NONE: by default a warp to coarser cells reads the source's overviews, and those
  // built by nearest neighbour (gdaladdo's default) are a thinned sample, not the cells to average.
  std::vector<std::string> common{"-of", "MEM", "-t_srs", request.crs, "-ot", "Float32", "-dstnodata", "nan",
                                  "-wo", "INIT_DEST=NO_DATA", "-ovr", "NONE"};
  if (request.resolution) {
    const std::string r = fmt::format("{:.17g}", *request.resolution);
    common.insert(common.end(), {"-tr", r, r});
    // Cells on multiples of the resolution, clipped or not, so that layers delivered with
    // another clip (or none) stack cell on cell; an --extent is taken as given.
    if (!request.extent) common.push_back("-tap");
  }
  if (request.extent) {
    // GDAL makes a grid of whole cells from the west and north edges and moves the east and
    // south ones, without a word: the study grid then ends elsewhere than the user wrote.
    if (request.resolution) {
      const auto& e = *request.extent;
      const double resolution = *request.resolution;
      std::vector<std::string> moved;
      for (const auto& [name, from, to, low] : {std::tuple{"XMAX", e[0], e[2], false}, std::tuple{"YMIN", e[3], e[1], true}}) {
        const double cells = std::abs(to - from) / resolution;
        const double whole = std::floor(cells + 0.5);  // GDAL's rounding (gdalwarp -te with -tr)
        // A thousandth of a cell is rounding in how the resolution was written (0.0083333 for
        // 30 arc seconds moves a 0.4 degree edge by 0.2 m), not a grid the user did not mean.
        if (std::abs(cells - whole) > 1e-3)
          moved.push_back(fmt::format("{} {:.10g} to {:.10g} ({:.6g} cells rounded to {:.0f})", name, to,
                                      low ? from - whole * resolution : from + whole * resolution, cells, whole));
      }
      if (!moved.empty())
        summary.notes.push_back(fmt::format("--extent is not a whole number of {:g} cells: the grid's edge moves, {}",
                                            resolution, fmt::join(moved, "; ")));
    }
    for (const std::string& v : {std::string("-te"), fmt::format("{:.17g}", (*request.extent)[0]),
                                 fmt::format("{:.17g}", (*request.extent)[1]), fmt::format("{:.17g}", (*request.extent)[2]),
                                 fmt::format("{:.17g}", (*request.extent)[3])})
      common.push_back(v);
  }
  if (!request.clip.empty()) {
    common.insert(common.end(), {"-cutline", request.clip});
    if (!request.extent) common.push_back("-crop_to_cutline");
  }

  // The study grid is held in memory, band by band and once more assembled: one far larger than
  // the machine (a clip far from the data, an extent in the wrong units) had crashed the warp
  // (SIGSEGV) or been killed by the kernel. Its size is known from a virtual warp, before any.
  const std::uint64_t usable = std::uint64_t(CPLGetUsablePhysicalRAM());
  for (std::size_t i = 0; i < sources.size(); ++i) {
    std::vector<std::string> args = common;
    args[1] = "VRT";  // "-of MEM" -> "-of VRT": the grid's size without its cells
    if (!source_crs[i].empty()) args.insert(args.end(), {"-s_srs", source_crs[i]});
    const DatasetPtr sized = warp(*datasets[i], args, sources[i].path);
    const std::uint64_t cells = std::uint64_t(sized->GetRasterXSize()) * std::uint64_t(sized->GetRasterYSize());
    // About 4 bytes a cell for each band 6 times over (the warps of each resampling, the
    // assembled layer, the compressed copy), and 2 more planes: a 3-band fill output on 4000 x
    // 4000 cells peaked at 1.24 GB RSS, 77 bytes a cell (a helper's measurement).
    const std::uint64_t bytes = cells * 4u * (6u * std::uint64_t(datasets[i]->GetRasterCount()) + 2u);
    if (usable > 0 && bytes > usable / 2)
      throw UsageError(sources[i].path,
                       fmt::format("its study grid would be {} x {} cells, about {:.1f} GiB in memory, more than half of "
                                   "this machine's {:.1f} GiB: give {}, a coarser --resolution or a clip nearer the "
                                   "data (a clip's whole bounding box is gridded)",
                                   sized->GetRasterXSize(), sized->GetRasterYSize(), double(bytes) / (1u << 30),
                                   double(usable) / (1u << 30),
                                   request.extent ? "a smaller --extent" : "an --extent"));
  }

  std::error_code ec;
  // Held while the layers are written (a second command into it is refused); its hidden
  // temporaries from a killed run go; removed again if this run made it and fails.
  const detail::OutputFolder output_folder(request.out_dir);
  // Every layer is written under a temporary name first, and all are published together at the
  // end: a layer that fails half-way had left the earlier ones replaced and the rest not.
  struct Staged {
    std::string temporary, target;
  };
  std::vector<Staged> staged;
  struct RemoveStaged {
    std::vector<Staged>& staged;
    ~RemoveStaged() {
      std::error_code ignored;
      for (const Staged& s : staged) fs::remove(s.temporary, ignored);
    }
  } remove_staged{staged};
  for (std::size_t i = 0; i < sources.size(); ++i) {
    GDALDataset& in = *datasets[i];
    const std::string& where = sources[i].path;
    std::vector<int> continuous, classes, days;
    int flag_band = 0;
    bool has_share = false;  // a layer gridded before: its filled_share is averaged like the values
    std::map<int, std::string> how;  // input band -> what KALENDS_RESAMPLING says
    for (int b = 1; b <= in.GetRasterCount(); ++b) {
      has_share = has_share || std::string(in.GetRasterBand(b)->GetDescription()) == "filled_share";
      switch (kind_of(*in.GetRasterBand(b))) {
        case BandKind::flag: flag_band = b; break;
        case BandKind::classes: classes.push_back(b), how[b] = "mode"; break;
        case BandKind::day_of_year: days.push_back(b), how[b] = "circular mean of the day of year"; break;
        case BandKind::continuous: continuous.push_back(b), how[b] = request.resample; break;
      }
    }
    // Each group of bands warped with its own resampling, then laid out in the input's order.
    std::vector<std::pair<int, GDALRasterBand*>> placed;  // input band -> warped band
    std::vector<DatasetPtr> keep;
    GDALDataset* warped_grid = nullptr;  // any warp's output: they all share the study grid
    auto warp_with = [&](GDALDataset& source, const std::string& method) -> GDALDataset& {
      std::vector<std::string> args = common;
      args.insert(args.end(), {"-r", method});
      if (!source_crs[i].empty()) args.insert(args.end(), {"-s_srs", source_crs[i]});
      keep.push_back(warp(source, args, where));
      warped_grid = keep.back().get();
      return *keep.back();
    };
    auto warp_bands = [&](const std::vector<int>& bands, const std::string& method) {
      if (bands.empty()) return;
      DatasetPtr view = bands.size() == std::size_t(in.GetRasterCount()) ? nullptr : band_subset(in, bands, where);
      GDALDataset& source = view ? *view : in;
      keep.push_back(std::move(view));
      GDALDataset& out = warp_with(source, method);
      for (std::size_t k = 0; k < bands.size(); ++k) placed.emplace_back(bands[k], out.GetRasterBand(int(k) + 1));
    };
    // Scaling after the warp is right for weighted means, nearest, the median and the like; a sum
    // or root mean square of stored numbers with an offset, and a minimum or maximum with a
    // negative scale, are not those of the values. Such bands are scaled first, one by one.
    // So are signed bytes (PIXELTYPE=SIGNEDBYTE), which the warp would read as 0..255, and bands
    // with a mask of their own, which the warp leaves unused where the band also has a nodata
    // value (or where it is an alpha band beside Float32 data).
    const bool scale_first_kind = request.resample == "sum" || request.resample == "rms" ||
                                  request.resample == "min" || request.resample == "max";
    std::vector<int> scaled_first;
    std::erase_if(continuous, [&](int b) {
      GDALRasterBand& band = *in.GetRasterBand(b);
      const double scale = band.GetScale(), offset = band.GetOffset();
      const bool first = detail::holds_signed_bytes(band) || detail::has_own_mask(band) ||
                         (scale_first_kind && ((offset != 0 && (request.resample == "sum" || request.resample == "rms")) ||
                                               (scale < 0 && request.resample != "sum")));
      if (first) scaled_first.push_back(b);
      return first;
    });
    warp_bands(continuous, request.resample);
    for (int b : scaled_first) {
      keep.push_back(mapped_band(in, b, [](float v) { return v; }, where));  // the physical values
      GDALDataset& warped = warp_with(*keep.back(), request.resample);
      placed.emplace_back(b, warped.GetRasterBand(1));
    }
    warp_bands(classes, "mode");
    // A day of year as an angle: the mean of its sine and cosine, turned back into a day. The
    // semi-annual harmonic's peak repeats every half year, so its circle is half as long (peaks
    // on days 2 and 181 are nearly in phase, not opposite).
    for (int b : days) {
      const double cycle = std::string(in.GetRasterBand(b)->GetDescription()).starts_with("semiannual")
                               ? days_per_year / 2
                               : days_per_year;
      DatasetPtr sine = mapped_band(in, b, [cycle](float d) { return float(std::sin(two_pi * (d - 1) / cycle)); }, where);
      DatasetPtr cosine = mapped_band(in, b, [cycle](float d) { return float(std::cos(two_pi * (d - 1) / cycle)); }, where);
      GDALDataset& s = warp_with(*sine, "average");
      GDALDataset& c = warp_with(*cosine, "average");
      keep.push_back(combined_band(s, *s.GetRasterBand(1), *c.GetRasterBand(1), [cycle](float y, float x) {
        if (std::isnan(y) || std::isnan(x)) return NAN;
        const double angle = std::atan2(double(y), double(x));
        return float(1 + cycle * (angle < 0 ? angle + two_pi : angle) / two_pi);
      }, where));
      placed.emplace_back(b, keep.back()->GetRasterBand(1));
    }
    // The flag: among the cells with a value (flags 0-2), the one covering most of the study
    // cell, each source cell counted by the share of it inside (the average of an indicator per
    // flag); ties go to the higher flag, so that a cell half observed is not called observed. A
    // study cell with a value thus never says "could not be filled"; 3 where no cell has a value
    // (the mode of all cells, which is then 3). GDAL's mode would give a sliver of a cell a
    // whole vote.
    GDALRasterBand* share = nullptr;
    if (flag_band) {
      how[flag_band] = "the flag (0-2) covering most of the cell; 3 where no cell has a value";
      std::array<GDALRasterBand*, 3> covering{};
      for (int f = 0; f < 3; ++f) {
        DatasetPtr indicator = mapped_band(in, flag_band, [f](float v) { return v <= 2 ? float(v == f) : NAN; }, where);
        covering[f] = warp_with(*indicator, "average").GetRasterBand(1);
        keep.push_back(std::move(indicator));
      }
      keep.push_back(band_subset(in, {flag_band}, where));  // the flag as it is, without a copy
      GDALDataset& all_mode = warp_with(*keep.back(), "mode");
      const int w = all_mode.GetRasterXSize(), h = all_mode.GetRasterYSize();
      std::array<std::vector<float>, 4> planes;
      for (int f = 0; f < 4; ++f) {
        planes[f].resize(std::size_t(w) * h);
        GDALRasterBand* b = f < 3 ? covering[f] : all_mode.GetRasterBand(1);
        if (b->RasterIO(GF_Read, 0, 0, w, h, planes[f].data(), w, h, GDT_Float32, 0, 0) != CE_None)
          throw OutputError(where, "cannot read the warped flag shares");
      }
      std::vector<float> flag(planes[3]), filled(std::size_t(w) * h, NAN);
      for (std::size_t c = 0; c < flag.size(); ++c) {
        if (std::isnan(planes[0][c])) continue;  // no cell with a value: the mode of all cells
        int best = 0;
        for (int f = 1; f < 3; ++f)
          if (planes[f][c] >= planes[best][c]) best = f;
        flag[c] = float(best);
        filled[c] = planes[1][c] + planes[2][c];
      }
      keep.push_back(plane_dataset(all_mode, flag, where));
      placed.emplace_back(flag_band, keep.back()->GetRasterBand(1));
      // The share of filled cells (flag 1 or 2) among those with a value, by area as the values
      // are averaged; from the flags of fill outputs only, not from those of a layer gridded before.
      if (!has_share) {
        keep.push_back(plane_dataset(all_mode, filled, where));
        share = keep.back()->GetRasterBand(1);
      }
    }
    std::sort(placed.begin(), placed.end(), [](const auto& a, const auto& b) { return a.first < b.first; });
    GDALDataset& first = *warped_grid;
    const int width = first.GetRasterXSize(), height = first.GetRasterYSize();
    const int bands = int(placed.size()) + (share ? 1 : 0);
    GDALDriver* mem = GetGDALDriverManager()->GetDriverByName("MEM");
    DatasetPtr result(mem->Create("", width, height, bands, GDT_Float32, nullptr));
    if (!result) throw OutputError(sources[i].relative, "out of memory for the study grid's layer");
    double gt[6];
    first.GetGeoTransform(gt);
    result->SetGeoTransform(gt);
    result->SetProjection(first.GetProjectionRef());
    result->SetMetadata(in.GetMetadata());
    // A study grid's cells are areas (means, modes of the cells under them), whatever the input
    // said: an input's AREA_OR_POINT=Point had been carried onto the new grid.
    result->SetMetadataItem(GDALMD_AREA_OR_POINT, GDALMD_AOP_AREA);
    std::vector<float> plane(std::size_t(width) * height);
    // Values leave as physical values: a band warped as stored gets its scale and offset here
    // (linear, so after the average as before it), and the output has none.
    auto copy_band = [&](GDALRasterBand* from, int to, const std::string& description, const std::string& unit,
                         const std::string& how, double scale = 1, double offset = 0) {
      if (from->RasterIO(GF_Read, 0, 0, width, height, plane.data(), width, height, GDT_Float32, 0, 0) != CE_None)
        throw OutputError(sources[i].relative, "cannot assemble the warped bands");
      if (scale != 1 || offset != 0)
        for (float& v : plane) v = float(v * scale + offset);
      if (result->GetRasterBand(to)->RasterIO(GF_Write, 0, 0, width, height, plane.data(), width, height, GDT_Float32,
                                              0, 0) != CE_None)
        throw OutputError(sources[i].relative, "cannot assemble the warped bands");
      GDALRasterBand* band = result->GetRasterBand(to);
      band->SetNoDataValue(NAN);
      if (!description.empty()) band->SetDescription(description.c_str());
      if (!unit.empty()) band->SetUnitType(unit.c_str());
      band->SetMetadataItem("KALENDS_RESAMPLING", how.c_str());
    };
    int to = 1;
    for (const auto& [from_band, warped] : placed) {
      GDALRasterBand* src = in.GetRasterBand(from_band);
      const bool as_stored = std::count(continuous.begin(), continuous.end(), from_band) > 0 ||
                             std::count(classes.begin(), classes.end(), from_band) > 0;
      copy_band(warped, to, src->GetDescription(), src->GetUnitType() ? src->GetUnitType() : "", how[from_band],
                as_stored ? src->GetScale() : 1.0, as_stored ? src->GetOffset() : 0.0);
      // The band's own metadata (a NetCDF band's time, a seasons band's days covered) travels
      // with it; the band had kept only its resampling, and a gridded NetCDF had lost its dates.
      if (char** items = src->GetMetadata())
        for (int k = 0; items[k]; ++k) {
          char* key = nullptr;
          const char* value = CPLParseNameValue(items[k], &key);
          // Not the packing of the source (the values leave unpacked) nor its fill value (NaN now).
          static const std::set<std::string> packing{"KALENDS_RESAMPLING", "scale_factor", "add_offset", "_FillValue",
                                                     "missing_value", "_Unsigned", "valid_range", "valid_min",
                                                     "valid_max"};
          if (key && value && !packing.count(key))
            result->GetRasterBand(to)->SetMetadataItem(key, value);
          CPLFree(key);
        }
      // What the band's classes mean (CLASS_MEANINGS, FLAG_MEANINGS) travels with it.
      for (const char* item : {"CLASS_MEANINGS", "FLAG_MEANINGS"})
        if (const char* text = src->GetMetadataItem(item)) result->GetRasterBand(to)->SetMetadataItem(item, text);
      ++to;
    }
    const int share_band = share ? to : 0;
    if (share) copy_band(share, to++, "filled_share", "1", "average of (flag 1 or 2) over cells with a value");
    if (flag_band) {
      // A cell without a value says so in its flag (3) and has no filled share, and a cell
      // flagged 3 has no value or sd, whatever the value band's resampling (nearest can miss the
      // cells with a value the flag counts; a sum picks up tiny weights of neighbouring cells).
      int flag_out = 1;
      while (placed[std::size_t(flag_out - 1)].first != flag_band) ++flag_out;
      std::vector<float> value(std::size_t(width) * height), flag(value.size()), filled(share_band ? value.size() : 0);
      auto io = [&](GDALRWFlag mode, int band, std::vector<float>& v) {
        if (result->GetRasterBand(band)->RasterIO(mode, 0, 0, width, height, v.data(), width, height, GDT_Float32, 0,
                                                  0) != CE_None)
          throw OutputError(sources[i].relative, "cannot assemble the warped bands");
      };
      int sd_out = 0;
      for (int b = 1; b <= result->GetRasterCount(); ++b)
        if (std::string(result->GetRasterBand(b)->GetDescription()) == "sd") sd_out = b;
      std::vector<float> sd(sd_out ? value.size() : 0);
      io(GF_Read, 1, value);
      io(GF_Read, flag_out, flag);
      if (share_band) io(GF_Read, share_band, filled);
      if (sd_out) io(GF_Read, sd_out, sd);
      for (std::size_t c = 0; c < value.size(); ++c)
        if (std::isnan(value[c]) || flag[c] == 3) {
          value[c] = NAN;
          if (!std::isnan(flag[c])) flag[c] = 3;
          if (share_band) filled[c] = NAN;
          if (sd_out) sd[c] = NAN;
        }
      io(GF_Write, 1, value);
      io(GF_Write, flag_out, flag);
      if (share_band) io(GF_Write, share_band, filled);
      if (sd_out) io(GF_Write, sd_out, sd);
    }
    // An interpolating kernel (cubic, lanczos) overshoots: a standard error is never negative and
    // a share lies in [0, 1] (also a filled_share gridded again, averaged like the values).
    for (int b = 1; b <= result->GetRasterCount(); ++b) {
      GDALRasterBand* band = result->GetRasterBand(b);
      const std::string description = band->GetDescription();
      if (description != "sd" && description != "filled_share") continue;
      std::vector<float> v(std::size_t(width) * height);
      if (band->RasterIO(GF_Read, 0, 0, width, height, v.data(), width, height, GDT_Float32, 0, 0) != CE_None)
        throw OutputError(sources[i].relative, "cannot assemble the warped bands");
      for (float& x : v)
        if (!std::isnan(x)) x = description == "sd" ? std::max(x, 0.0f) : std::clamp(x, 0.0f, 1.0f);
      if (band->RasterIO(GF_Write, 0, 0, width, height, v.data(), width, height, GDT_Float32, 0, 0) != CE_None)
        throw OutputError(sources[i].relative, "cannot assemble the warped bands");
    }
    {
      // Whether the study grid holds any value of the layer: of any band but a fill's flag (3
      // where there is no value), so that a layer whose first band alone is empty (a month
      // without suitability, an undefined first season) is not called empty.
      std::vector<float> plane(std::size_t(width) * height);
      bool any_value = false;
      for (int b = 1; b <= result->GetRasterCount() && !any_value; ++b) {
        GDALRasterBand* band = result->GetRasterBand(b);
        if (b > 1 && std::string(band->GetDescription()) == "flag") continue;
        any_value = band->RasterIO(GF_Read, 0, 0, width, height, plane.data(), width, height, GDT_Float32, 0, 0) ==
                        CE_None &&
                    std::any_of(plane.begin(), plane.end(), [](float v) { return std::isfinite(v); });
      }
      if (!any_value) summary.without_value.push_back(sources[i].relative);
    }
    result->SetMetadataItem("KALENDS_VERSION", KALENDS_VERSION);
    result->SetMetadataItem("KALENDS_GRID_CRS", request.crs.c_str());
    result->SetMetadataItem("KALENDS_GRID_SOURCE", where.c_str());
    if (!request.clip.empty()) result->SetMetadataItem("KALENDS_GRID_CLIP", request.clip.c_str());
    if (!request.command_line.empty()) result->SetMetadataItem("KALENDS_COMMAND", request.command_line.c_str());

    const fs::path target = fs::path(request.out_dir) / sources[i].relative;
    fs::create_directories(target.parent_path(), ec);
    if (ec) throw OutputError(target.parent_path().string(), "cannot create the folder: " + ec.message());
    const std::string temporary = detail::temporary_name(target.string());
    fs::remove(temporary + ".ovr.tmp", ec);  // GDAL's, beside a COG in the making, left by a killed run
    CPLStringList cog;
    cog.SetNameValue("COMPRESS", "DEFLATE");
    cog.SetNameValue("PREDICTOR", "YES");
    cog.SetNameValue("OVERVIEWS", "AUTO");
    // One overview resampling serves every band: nearest where a class band would be averaged.
    cog.SetNameValue("RESAMPLING", classes.empty() && days.empty() && !flag_band ? "AVERAGE" : "NEAREST");
    GDALDriver* driver = GetGDALDriverManager()->GetDriverByName("COG");
    if (!driver) throw OutputError(target.string(), "GDAL has no COG driver");
    CPLErrorReset();
    GDALDatasetUniquePtr written(driver->CreateCopy(temporary.c_str(), result.get(), false, cog.List(), nullptr, nullptr));
    if (!written) {
      fs::remove(temporary, ec);
      throw detail::write_failure(target.string(), "cannot write (" + detail::gdal_message("unknown reason") + ")");
    }
    written.reset();
    // A write past a file-size limit or on a full disk shows only as an error while the copy is
    // flushed and closed: the file had been published truncated, with exit 0. Every band is read
    // back, so a file that cannot be read whole is never published.
    if (CPLGetLastErrorType() == CE_Failure || !readable_whole(temporary)) {
      const std::string why = detail::gdal_message("it cannot be read back whole");
      fs::remove(temporary, ec);
      fs::remove(temporary + ".ovr.tmp", ec);
      throw detail::write_failure(target.string(), "cannot write (" + why + ")");
    }
    // GDAL's side file of a header that did not fit (out of memory at the close): the CRS would
    // be in it, not in the file, once renamed; as the fill's outputs are checked.
    try {
      detail::require_header_in_file(temporary, target.string());
    } catch (const Error&) {
      fs::remove(temporary, ec);
      throw;
    }
    if (fs::exists(target) && detail::same_raster_content(target.string(), temporary)) {
      fs::remove(temporary, ec);
      ++summary.outputs_unchanged;
    } else {
      staged.push_back({temporary, target.string()});
      ++summary.outputs_written;
    }
    summary.outputs.push_back(target.string());
    summary.width = width;
    summary.height = height;
  }
  // Marked while the layers are renamed one by one: a grid killed among the renames had left a
  // folder of part old, part new layers that extract and report read without a word.
  std::set<std::string> folders;
  for (const Staged& s : staged) folders.insert(fs::path(s.target).parent_path().string());
  detail::mark_publishing(folders);
  for (const Staged& s : staged) detail::publish_file(s.temporary, s.target);
  detail::unmark_publishing(folders);
  staged.clear();
  if (!summary.without_value.empty()) {
    // The likely causes of what was given: an extent or clip beside the data, or, with neither,
    // cells so large that the data covers too little of any (GDAL's average then leaves it empty).
    const std::string why = request.extent || !request.clip.empty()
                                ? "does the extent or clip lie beside the data, or --crs differ from the extent's?"
                                : "are the cells too large for the data (--resolution in the units of --crs)? A "
                                  "layer covering too little of each cell gets no average";
    summary.notes.push_back(fmt::format("{} of {} layers have no value on the study grid (first: {}): {}",
                                        summary.without_value.size(), summary.outputs.size(),
                                        summary.without_value.front(), why));
  }
  return summary;
}

}  // namespace kalends
