// kalends extract: covariate values at survey points. Coordinates go into each layer's CRS with
// OGRCoordinateTransformation (PROJ), in longitude-latitude / easting-northing order
// (OAMS_TRADITIONAL_GIS_ORDER). Pixel positions come from the inverse geotransform; cell (c, r)
// covers [c, c+1) x [r, r+1) in pixel coordinates and its centre is at (c + 0.5, r + 0.5); a
// point within 1e-6 px of an edge or centre is taken as on it.
//   nearest:  the cell holding the point.
//   bilinear: the four cell centres around the point, weights (1-fx)(1-fy) ... (the usual
//             bilinear interpolation); beyond the outermost centres the edge cells are repeated.
//             Missing when a cell with a non-zero weight has no value.
//   buffer:   mean of the cells with a value whose centre lies within the radius: geodesic
//             distance on the layer's ellipsoid (Karney 2013, J. Geodesy 87:43-55, as PROJ's
//             geodesic.h computes it) between the point and each cell centre in longitude-
//             latitude (a projected CRS's centres taken to its own geographic CRS by PROJ).
//             Distance on the grid of a projected CRS had sheared the circle on a sinusoidal grid
//             (MODIS) away from its central meridian; a sphere is off by up to about 0.6 %. A
//             CRS with no geographic CRS (a local engineering one): distance on the grid.
#include <fmt/format.h>
#include <cpl_conv.h>
#include <fnmatch.h>
#include <geodesic.h>
#include <ogr_spatialref.h>

#include <algorithm>
#include <filesystem>
#include <fstream>
#include <cmath>
#include <map>
#include <tuple>
#include <memory>

#include "io/folder_read_lock.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "io/text_file.hpp"
#include "kalends/error.hpp"
#include "kalends/season.hpp"
#include "kalends/extract.hpp"

namespace kalends {

namespace {

constexpr double earth_radius_m = 6371008.8;
constexpr double pi = 3.14159265358979323846;

double haversine_m(double lon1, double lat1, double lon2, double lat2) {
  const double r = pi / 180;
  const double a = std::pow(std::sin((lat2 - lat1) * r / 2), 2) +
                   std::cos(lat1 * r) * std::cos(lat2 * r) * std::pow(std::sin((lon2 - lon1) * r / 2), 2);
  return 2 * earth_radius_m * std::asin(std::min(1.0, std::sqrt(a)));
}

struct Cell {
  double value = NAN, sd = NAN, flag = NAN;
};

// The open files of a run, each read cell by cell through GDAL's block cache.
class Files {
 public:
  GDALDataset& get(const std::string& path) {
    auto it = open_.find(path);
    if (it == open_.end()) it = open_.emplace(path, detail::open_raster(path)).first;
    return *it->second;
  }

  // Physical values of a window of one band (scale and offset applied; nodata -> NaN).
  std::vector<double> read(const std::string& path, int band, int col, int row, int cols, int rows) {
    GDALDataset& ds = get(path);
    if (band > ds.GetRasterCount()) throw InputError(path, fmt::format("has no band {}", band));
    GDALRasterBand* b = ds.GetRasterBand(band);
    std::vector<double> v(static_cast<std::size_t>(cols) * rows);
    CPLErrorReset();
    // Signed bytes as signed; cells the band's own mask marks invalid are NaN.
    if (!detail::read_stored_values(*b, col, row, cols, rows, v.data(), GDT_Float64)) detail::throw_read_failed(path);
    int has_nodata = 0;
    const double nodata = b->GetNoDataValue(&has_nodata);
    const double scale = b->GetScale(), offset = b->GetOffset();
    for (double& x : v) {
      if (std::isnan(x) || (has_nodata && x == nodata)) x = NAN;
      else x = x * scale + offset;
    }
    return v;
  }

 private:
  std::map<std::string, GDALDatasetUniquePtr> open_;
};

// Where a point lies in one series' grid.
struct Placement {
  bool located = false;  // in the layer's CRS (possibly outside the layer)
  bool inside = false;
  double px = 0, py = 0;   // pixel coordinates
  double x = 0, y = 0;     // in the layer's CRS
  std::string reason;
};

class SeriesGeometry {
 public:
  SeriesGeometry(const CovariateSeries& s, const OGRSpatialReference& points_crs, double buffer_m)
      : series_(s), buffer_m_(buffer_m) {
    const std::string& where = s.files.front().path;
    // Which part is missing: a file with a geotransform and no CRS has georeferencing, half of it.
    if (!s.grid.has_geotransform)
      throw InputError(where, s.grid.crs_wkt.empty() ? "has no georeferencing (geotransform and CRS); points cannot be placed on it"
                                                     : "has no geotransform; points cannot be placed on it");
    if (s.grid.crs_wkt.empty())
      throw InputError(where, "states no CRS; points cannot be placed on it (set one with gdal_edit.py -a_srs)");
    layer_crs_.importFromWkt(s.grid.crs_wkt.c_str());
    layer_crs_.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
    transform_.reset(OGRCreateCoordinateTransformation(&points_crs, &layer_crs_));
    if (!transform_) throw InputError(where, "no transformation from the points' CRS into this layer's CRS");
    if (!GDALInvGeoTransform(const_cast<double*>(s.grid.geotransform.data()), inverse_))
      throw InputError(where, "its geotransform cannot be inverted");
    geographic_ = layer_crs_.IsGeographic();
    points_geographic_ = points_crs.IsGeographic();
    {
      OGRErr error = OGRERR_NONE;
      const double semi_major = layer_crs_.GetSemiMajor(&error);
      const double inverse_flattening = layer_crs_.GetInvFlattening();
      geod_init(&ellipsoid_, error == OGRERR_NONE && semi_major > 0 ? semi_major : earth_radius_m,
                error == OGRERR_NONE && inverse_flattening > 0 ? 1 / inverse_flattening : 0);
    }
    metres_per_unit_ = geographic_ ? 1.0 : layer_crs_.GetLinearUnits();
    if (!geographic_ && buffer_m > 0) {
      OGRSpatialReference geographic;
      CPLPushErrorHandler(CPLQuietErrorHandler);
      if (geographic.CopyGeogCSFrom(&layer_crs_) == OGRERR_NONE) {
        geographic.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
        to_geographic_.reset(OGRCreateCoordinateTransformation(&layer_crs_, &geographic));
        from_geographic_.reset(OGRCreateCoordinateTransformation(&geographic, &layer_crs_));
      }
      CPLPopErrorHandler();
      if (!to_geographic_ || !from_geographic_) to_geographic_.reset(), from_geographic_.reset();
    }
  }

  Placement place(const SurveyPoint& p) const {
    Placement out;
    if (!p.has_coordinates) {
      out.reason = "no coordinates";
      return out;
    }
    // Longitudes of 0..360 against a layer of -180..180, or the other way round: the same
    // place a turn of the globe away, tried where the point as written falls outside; outside
    // every way, the place nearest the layer, so that a buffer reaches across 180 degrees into
    // a layer that ends there (a point at -179.95 beside a grid of 160..180 had found none).
    double nearest = HUGE_VAL;
    for (const double turn : {0.0, -360.0, 360.0}) {
      if (turn != 0 && !points_geographic_) break;
      double x = p.x + turn, y = p.y;
      if (!transform_->Transform(1, &x, &y) || !std::isfinite(x) || !std::isfinite(y)) {
        if (turn == 0) out.reason = "the point cannot be transformed into the layer's CRS";
        continue;
      }
      Placement at;
      at.located = true;
      at.x = x;
      at.y = y;
      at.px = pixel_column(x, y);
      at.py = pixel_row(x, y);
      at.inside = at.px >= 0 && at.px < series_.grid.width && at.py >= 0 && at.py < series_.grid.height;
      if (!at.inside) at.reason = "outside the layer";
      const double gap = std::hypot(std::max({0.0, -at.px, at.px - series_.grid.width}),
                                    std::max({0.0, -at.py, at.py - series_.grid.height}));
      if (at.inside || gap < nearest) out = at, nearest = gap;
      if (at.inside) break;
    }
    return out;
  }

  // Pixel coordinates of a point in the layer's CRS. A point on a cell edge or centre as written
  // (survey coordinates rounded to the grid's step) comes out of the inverse geotransform a few
  // 1e-12 px to either side: snapped, so that a centre needs only its own cell's row or column,
  // and an edge goes to the cell whose west or north edge it is (docs/extract.md). On a grid
  // stored south-up or east-to-west that cell lies before the edge in pixel order: moved just
  // below the edge (it had gone to the cell past it, one row or column off). A millionth of a
  // pixel is far below any survey's precision.
  double pixel_column(double x, double y) const {
    return snapped(to_pixel(x, y).first, series_.grid.geotransform[1] < 0);
  }
  double pixel_row(double x, double y) const { return snapped(to_pixel(x, y).second, series_.grid.geotransform[5] > 0); }
  // (column, row) of a point in the layer's CRS, by the inverse geotransform; not snapped.
  std::pair<double, double> to_pixel(double x, double y) const {
    return {inverse_[0] + x * inverse_[1] + y * inverse_[2], inverse_[3] + x * inverse_[4] + y * inverse_[5]};
  }
  // The centre of cell (c, r) in the layer's CRS.
  std::pair<double, double> cell_centre(int c, int r) const {
    const auto& gt = series_.grid.geotransform;
    return {gt[0] + (c + 0.5) * gt[1] + (r + 0.5) * gt[2], gt[3] + (c + 0.5) * gt[4] + (r + 0.5) * gt[5]};
  }
  static double snapped(double pixel, bool reversed) {
    const double half = std::round(2 * pixel) / 2;
    if (std::abs(pixel - half) >= 1e-6) return pixel;
    return reversed && half == std::floor(half) ? std::nextafter(half, -HUGE_VAL) : half;
  }

  // The cells whose centre lies within the buffer: a bounding window, then the distance test.
  std::vector<std::pair<int, int>> buffer_cells(const Placement& at) const {
    const auto& gt = series_.grid.geotransform;
    double half_x, half_y;  // half-extent of the search box in CRS units
    if (geographic_) {
      half_y = buffer_m_ / (earth_radius_m * pi / 180) * 1.01;
      half_x = half_y / std::max(1e-6, std::cos(at.y * pi / 180));
    } else {
      half_x = half_y = buffer_m_ / metres_per_unit_ * 1.01;
    }
    double cmin = 1e300, cmax = -1e300, rmin = 1e300, rmax = -1e300;
    auto extend = [&](double x, double y) {
      const auto [c, r] = to_pixel(x, y);
      cmin = std::min(cmin, c), cmax = std::max(cmax, c), rmin = std::min(rmin, r), rmax = std::max(rmax, r);
    };
    for (double dx : {-half_x, half_x})
      for (double dy : {-half_y, half_y}) extend(at.x + dx, at.y + dy);
    // A projected CRS: the point in longitude-latitude, and the box widened to hold the circle
    // on the ground, traced at every 5 degrees of bearing (a sheared grid holds it off the
    // grid's own circle).
    double lon = at.x, lat = at.y;
    const bool on_ground = !geographic_ && to_geographic_ && to_geographic_->Transform(1, &lon, &lat) &&
                           std::isfinite(lon) && std::isfinite(lat);
    if (on_ground) {
      const double angle = buffer_m_ / earth_radius_m, phi = lat * pi / 180;
      for (int k = 0; k < 72; ++k) {
        const double bearing = k * 5 * pi / 180;
        const double phi2 = std::asin(std::sin(phi) * std::cos(angle) + std::cos(phi) * std::sin(angle) * std::cos(bearing));
        const double lambda2 = lon * pi / 180 + std::atan2(std::sin(bearing) * std::sin(angle) * std::cos(phi),
                                                           std::cos(angle) - std::sin(phi) * std::sin(phi2));
        double x = lambda2 * 180 / pi, y = phi2 * 180 / pi;
        if (from_geographic_->Transform(1, &x, &y) && std::isfinite(x) && std::isfinite(y)) extend(x, y);
      }
    }
    std::vector<std::pair<int, int>> cells;
    const int width = series_.grid.width;
    // Two cells of margin: the traced circle's chords cut inside it by under 0.4 % of the radius.
    int c0 = std::max(0, static_cast<int>(std::floor(std::max(cmin, -1e9))) - 2);
    int c1 = std::min(width - 1, static_cast<int>(std::floor(std::min(cmax, 1e9))) + 2);
    // Clamped as the columns are: a radius of 1e12 m had overflowed the cast (undefined; an
    // empty mean, exit 0).
    const int r0 = std::max(0, static_cast<int>(std::floor(std::max(rmin, -1e9))) - 2);
    const int r1 = std::min(series_.grid.height - 1, static_cast<int>(std::floor(std::min(rmax, 1e9))) + 2);
    // A geographic grid round the globe: the circle goes on across its seam (the antimeridian,
    // or longitude 0 of a 0..360 grid), and one over a pole takes every longitude; the cells
    // beyond the seam or the pole had been left out of the mean.
    if (geographic_) {
      const bool plain = gt[2] == 0 && gt[4] == 0;
      const bool global = plain && std::abs(std::abs(gt[1]) * width - 360.0) < 0.5 * std::abs(gt[1]);
      const bool over_pole = std::abs(at.y) + half_y >= 90;
      if (over_pole) {
        c0 = 0, c1 = width - 1;
      } else if (global && cmax - cmin + 5 < width) {
        c0 = static_cast<int>(std::floor(cmin)) - 2, c1 = static_cast<int>(std::floor(cmax)) + 2;
      } else if (global) {
        c0 = 0, c1 = width - 1;
      }
    }
    for (int r = r0; r <= r1; ++r)
      for (int unwrapped = c0; unwrapped <= c1; ++unwrapped) {
        const int c = ((unwrapped % width) + width) % width;
        const auto [x, y] = cell_centre(c, r);
        double d;
        if (geographic_) {
          d = ground_m(at.x, at.y, x, y);
        } else if (on_ground) {
          const auto [centre_lon, centre_lat] = centre_on_ground(c, r);
          d = std::isfinite(centre_lon) ? ground_m(lon, lat, centre_lon, centre_lat) : HUGE_VAL;
        } else {
          d = std::hypot(x - at.x, y - at.y) * metres_per_unit_;
        }
        if (d <= buffer_m_) cells.emplace_back(c, r);
      }
    return cells;
  }

  // Geodesic distance on the layer's ellipsoid, where it decides: the sphere is within 1 % of
  // it (flattening 1/298), so a cell clearly in or out by the haversine keeps that answer and
  // only those near the circle pay for the geodesic (about twenty times the cost).
  double ground_m(double lon1, double lat1, double lon2, double lat2) const {
    const double sphere = haversine_m(lon1, lat1, lon2, lat2);
    if (sphere < 0.98 * buffer_m_ || sphere > 1.02 * buffer_m_) return sphere;
    double metres = 0;
    geod_inverse(&ellipsoid_, lat1, lon1, lat2, lon2, &metres, nullptr, nullptr);
    return metres;
  }

  // The longitude and latitude of cell (c, r)'s centre (NaN where PROJ cannot say), transformed
  // a tile of 64 x 64 cells at a time and kept: surveys share their neighbourhoods, and a
  // transform per cell and point had made a 5 km buffer on the Landsat scene 17 times slower.
  std::pair<double, double> centre_on_ground(int c, int r) const {
    constexpr int tile = 64;
    const std::pair<int, int> key{r / tile, c / tile};
    auto it = centres_.find(key);
    if (it == centres_.end()) {
      const int tr0 = key.first * tile, tc0 = key.second * tile;
      const int rows = std::min(tile, series_.grid.height - tr0), cols = std::min(tile, series_.grid.width - tc0);
      std::vector<double> lons, lats;
      for (int rr = tr0; rr < tr0 + rows; ++rr)
        for (int cc = tc0; cc < tc0 + cols; ++cc) {
          const auto [x, y] = cell_centre(cc, rr);
          lons.push_back(x);
          lats.push_back(y);
        }
      std::vector<int> ok(lons.size(), 1);
      to_geographic_->Transform(int(lons.size()), lons.data(), lats.data(), nullptr, ok.data());
      std::vector<std::pair<double, double>> tile_centres(lons.size());
      for (std::size_t i = 0; i < lons.size(); ++i)
        tile_centres[i] = ok[i] && std::isfinite(lons[i]) && std::isfinite(lats[i]) ? std::pair{lons[i], lats[i]}
                                                                                 : std::pair<double, double>{NAN, NAN};
      it = centres_.emplace(key, std::move(tile_centres)).first;
    }
    const int cols = std::min(tile, series_.grid.width - key.second * tile);
    return it->second[std::size_t(r - key.first * tile) * cols + (c - key.second * tile)];
  }

 private:
  const CovariateSeries& series_;
  double buffer_m_;
  OGRSpatialReference layer_crs_;
  std::unique_ptr<OGRCoordinateTransformation> transform_;
  // A projected layer: to and from its own geographic CRS, for distances on the ground.
  std::unique_ptr<OGRCoordinateTransformation> to_geographic_, from_geographic_;
  mutable std::map<std::pair<int, int>, std::vector<std::pair<double, double>>> centres_;  // by tile
  double inverse_[6]{};
  bool geographic_ = false, points_geographic_ = false;
  geod_geodesic ellipsoid_{};  // the layer's, for buffer distances
  double metres_per_unit_ = 1;
};

void sample(Files& files, const CovariateSeries& s, const std::string& path, int band, const Placement& at,
            Sampling sampling, ExtractedValue& out) {
  const int w = s.grid.width, h = s.grid.height;
  auto read_cells = [&](int col, int row, int cols, int rows) {
    std::vector<Cell> cells(static_cast<std::size_t>(cols) * rows);
    const auto v = files.read(path, band, col, row, cols, rows);
    for (std::size_t i = 0; i < cells.size(); ++i) cells[i].value = v[i];
    if (s.has_sd_and_flag) {
      const auto sd = files.read(path, 2, col, row, cols, rows);
      const auto flag = files.read(path, 3, col, row, cols, rows);
      for (std::size_t i = 0; i < cells.size(); ++i) cells[i].sd = sd[i], cells[i].flag = flag[i];
    }
    return cells;
  };
  if (sampling == Sampling::nearest) {
    const Cell c = read_cells(static_cast<int>(at.px), static_cast<int>(at.py), 1, 1)[0];
    if (s.has_sd_and_flag && !std::isnan(c.flag)) out.flag = c.flag;
    if (std::isnan(c.value)) {
      // A fill's flag 3 says why: the method could not fill it (it had read as plain nodata).
      out.reason = s.has_sd_and_flag && c.flag == 3 ? "not filled (flag 3)" : "nodata";
      return;
    }
    out.value = c.value;
    if (!std::isnan(c.sd)) out.sd = c.sd;
    return;
  }
  const double u = at.px - 0.5, v = at.py - 0.5;
  const int cu = static_cast<int>(std::floor(u)), rv = static_cast<int>(std::floor(v));
  const double fx = u - cu, fy = v - rv;
  const int cols[2] = {std::clamp(cu, 0, w - 1), std::clamp(cu + 1, 0, w - 1)};
  const int rows[2] = {std::clamp(rv, 0, h - 1), std::clamp(rv + 1, 0, h - 1)};
  const int col0 = cols[0], row0 = rows[0];
  const auto cells = read_cells(col0, row0, cols[1] - col0 + 1, rows[1] - row0 + 1);
  const int stride = cols[1] - col0 + 1;
  double value = 0, sd = 0, flag = -1;
  bool missing = false, sd_missing = false;
  for (int j = 0; j < 2; ++j)
    for (int i = 0; i < 2; ++i) {
      const double weight = (i ? fx : 1 - fx) * (j ? fy : 1 - fy);
      if (weight <= 0) continue;
      const Cell& c = cells[(rows[j] - row0) * stride + (cols[i] - col0)];
      if (std::isnan(c.value)) missing = true;
      value += weight * c.value;
      if (s.has_sd_and_flag) {
        if (std::isnan(c.sd)) sd_missing = true;
        sd += weight * c.sd;
        if (!std::isnan(c.flag)) flag = std::max(flag, c.flag);
      }
    }
  if (s.has_sd_and_flag && flag >= 0) out.flag = flag;
  if (missing) {
    out.reason = "nodata in the bilinear neighbourhood";
    return;
  }
  out.value = value;
  if (s.has_sd_and_flag && !sd_missing) out.sd = sd;
}

void buffer_mean(Files& files, const CovariateSeries& s, const std::string& path, int band,
                 const std::vector<std::pair<int, int>>& cells, ExtractedValue& out) {
  if (cells.empty()) return;
  int c0 = cells.front().first, c1 = c0, r0 = cells.front().second, r1 = r0;
  for (auto [c, r] : cells) c0 = std::min(c0, c), c1 = std::max(c1, c), r0 = std::min(r0, r), r1 = std::max(r1, r);
  const int cols = c1 - c0 + 1, rows = r1 - r0 + 1;
  const auto values = files.read(path, band, c0, r0, cols, rows);
  std::vector<double> flags;
  if (s.has_sd_and_flag) flags = files.read(path, 3, c0, r0, cols, rows);
  double sum = 0;
  for (auto [c, r] : cells) {
    const std::size_t i = static_cast<std::size_t>(r - r0) * cols + (c - c0);
    if (std::isnan(values[i])) continue;
    sum += values[i];
    ++out.buffer_cells;
    if (!flags.empty() && flags[i] == 2) ++out.buffer_filled;
  }
  if (out.buffer_cells > 0) out.buffer_mean = sum / out.buffer_cells;
}

std::string csv_field(const std::string& s) {
  if (s.find_first_of(",\"\n\r") == std::string::npos) return s;
  std::string q = "\"";
  for (char c : s) q += c == '"' ? std::string("\"\"") : std::string(1, c);
  return q + "\"";
}

std::string number(const std::optional<double>& v) { return v ? fmt::format("{:.9g}", *v) : ""; }

std::vector<CovariateSeries> select(std::vector<CovariateSeries> all, const std::vector<std::string>& patterns,
                                   bool descriptors) {
  if (patterns.empty()) return all;
  std::vector<CovariateSeries> chosen;
  for (const std::string& p : patterns) {
    bool any = false;
    for (const CovariateSeries& s : all)
      if (fnmatch(p.c_str(), s.name.c_str(), 0) == 0) {
        any = true;
        if (std::none_of(chosen.begin(), chosen.end(), [&](const CovariateSeries& c) { return c.name == s.name; }))
          chosen.push_back(s);
      }
    if (!any) {
      std::string names;
      for (const CovariateSeries& s : all) names += (names.empty() ? "" : ", ") + s.name;
      // Cycle descriptors and suitable-month counts are layers only with --descriptors, which the
      // list had not said.
      throw UsageError("--layers '" + p + "'", "matches no layer; the layers are: " + names +
                                                   (descriptors ? "" : " (descriptors such as amplitude, peak day or "
                                                                       "suitable months: give --descriptors)"));
    }
  }
  return chosen;
}

// The lags a layer is read at besides the survey's own period: none for a fixed layer.
int lag_count(const ExtractRequest& request, const CovariateSeries& s) {
  return s.kind == SeriesKind::fixed ? 0 : static_cast<int>(request.lags.size());
}

// The table's header: the points' id, coordinate and date columns (the first four), then the
// long table's own columns or each layer's.
std::vector<std::string> table_columns(const ExtractRequest& request, const ExtractResult& r) {
  const bool csv = r.points.from_columns;
  const bool buffer = request.buffer_metres > 0;
  std::vector<std::string> columns = {r.points.id_name, csv ? r.points.x_name : "x", csv ? r.points.y_name : "y",
                                      r.points.date_name.empty() ? "date" : r.points.date_name};
  if (request.long_format) {
    for (const char* c : {"layer", "lag", "matched", "value", "sd", "flag"}) columns.push_back(c);
    if (buffer)
      for (const char* c : {"buffer_mean", "buffer_cells", "buffer_filled"}) columns.push_back(c);
    columns.push_back("reason");
  } else {
    for (const CovariateSeries& s : r.series)
      for (int l = 0; l <= lag_count(request, s); ++l) {
        const std::string base = s.name + (l ? ".lag" + std::to_string(request.lags[l - 1]) : "");
        columns.push_back(base);
        columns.push_back(base + ".matched");
        if (s.has_sd_and_flag) columns.push_back(base + ".sd"), columns.push_back(base + ".flag");
        if (buffer) {
          columns.push_back(base + ".buffer_mean");
          columns.push_back(base + ".buffer_cells");
          if (s.has_sd_and_flag) columns.push_back(base + ".buffer_filled");
        }
        columns.push_back(base + ".reason");
      }
  }
  return columns;
}

// Two columns of one name (a points column named 'layer' or 'value' beside the long table's
// own, or like a layer's, 'v' or 'v.matched'): R and pandas rename one without a word. Refused
// before any work, naming the option of a points column.
void require_distinct_columns(const ExtractRequest& request, const ExtractResult& r) {
  const std::vector<std::string> columns = table_columns(request, r);
  static const char* const options[] = {"--id-column", "--x-column", "--y-column", "--date-column"};
  std::map<std::string, std::size_t> seen;
  for (std::size_t k = 0; k < columns.size(); ++k) {
    std::string key = columns[k];
    std::transform(key.begin(), key.end(), key.begin(), [](unsigned char ch) { return char(std::tolower(ch)); });
    const auto [it, added] = seen.emplace(key, k);
    if (added) continue;
    const std::size_t first = it->second;
    if (first < 4 && request.long_format)
      throw UsageError(std::string(options[first]) + " '" + columns[first] + "'",
                       "is a column the long table (--long) writes itself; rename that column of " +
                           request.points.path + " and give its new name");
    if (first < 4)
      throw InputError(request.points.path,
                       fmt::format("its column '{}' has the name of a column the table writes (for a layer); rename "
                                   "it, or leave that layer out with --layers",
                                   columns[first]));
    throw InputError(request.points.path, fmt::format("the table would have two columns named '{}'", columns[k]));
  }
}

std::string write_table(const ExtractRequest& request, const ExtractResult& r) {
  const bool csv = r.points.from_columns;
  const bool buffer = request.buffer_metres > 0;
  const std::vector<std::string> columns = table_columns(request, r);
  std::string text;
  for (std::size_t k = 0; k < columns.size(); ++k) text += (k ? "," : "") + csv_field(columns[k]);
  text += "\n";
  auto point_fields = [&](const SurveyPoint& p) {
    if (csv) return fmt::format("{},{},{},{}", csv_field(p.id), csv_field(p.x_text), csv_field(p.y_text), csv_field(p.date_text));
    return fmt::format("{},{},{},{}", csv_field(p.id), p.has_coordinates ? fmt::format("{:.10g}", p.x) : "",
                       p.has_coordinates ? fmt::format("{:.10g}", p.y) : "", csv_field(p.date_text));
  };
  std::size_t k = 0;
  for (std::size_t i = 0; i < r.points.points.size(); ++i) {
    const std::string pf = point_fields(r.points.points[i]);
    if (!request.long_format) text += pf;
    for (const CovariateSeries& s : r.series)
      for (int l = 0; l <= lag_count(request, s); ++l) {
        const ExtractedValue& v = r.values[k++];
        const std::string cells = std::to_string(v.buffer_cells), filled = std::to_string(v.buffer_filled);
        if (request.long_format) {
          text += pf + "," + csv_field(s.name) + "," + std::to_string(v.lag) + "," + csv_field(v.matched) + "," +
                  number(v.value) + "," + number(v.sd) + "," + number(v.flag);
          if (buffer) text += "," + number(v.buffer_mean) + "," + cells + "," + (s.has_sd_and_flag ? filled : "");
          text += "," + csv_field(v.reason) + "\n";
        } else {
          text += "," + number(v.value) + "," + csv_field(v.matched);
          if (s.has_sd_and_flag) text += "," + number(v.sd) + "," + number(v.flag);
          if (buffer) {
            text += "," + number(v.buffer_mean) + "," + cells;
            if (s.has_sd_and_flag) text += "," + filled;
          }
          text += "," + csv_field(v.reason);
        }
      }
    if (!request.long_format) text += "\n";
  }
  return text;
}

}  // namespace

Sampling parse_sampling(const std::string& text) {
  if (text == "nearest") return Sampling::nearest;
  if (text == "bilinear") return Sampling::bilinear;
  throw UsageError("--sampling '" + text + "'", "expected nearest or bilinear");
}

namespace {

// The header of a table this command writes: its last column is the reason ("reason" in the
// long form, "<layer>.reason" in the wide one) and a "matched" column comes before it.
bool is_extract_table(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::string header;
  std::getline(in, header);
  if (!header.empty() && header.back() == '\r') header.pop_back();
  const bool ends_with_reason = header.size() >= 7 && (header.ends_with(",reason") || header.ends_with(".reason") ||
                                                       header.ends_with(".reason\""));
  return ends_with_reason && header.find("matched") != std::string::npos;
}

}  // namespace

void check_extract_options(const ExtractRequest& request) {
  if (!request.points.crs.empty()) {
    OGRSpatialReference crs;
    detail::set_crs_from_user(crs, request.points.crs, "--crs");
  }
  // inf had been taken: an empty buffer mean for every point, with no reason given.
  if (!(request.buffer_metres >= 0 && std::isfinite(request.buffer_metres)))
    throw UsageError("--buffer", "the radius must be a positive, finite number of metres");
  for (int lag : request.lags)
    if (lag < 1) throw UsageError("--lags", "lags count periods before the survey's: 1, 2, ...");
  if (!request.out.empty() && std::filesystem::is_directory(request.out))
    throw UsageError("--out '" + request.out + "'", "is a folder; give the table's file name, e.g. table.csv");
}

ExtractResult run_extract(const ExtractRequest& request) {
  check_extract_options(request);
  // Said before the work, not after it ("cannot write (No such file or directory)"). An empty
  // name keeps the table in memory.
  if (!request.out.empty()) detail::require_file_destination(request.out, "--out", "table.csv");
  // Reads go file by file in batches, so a small block cache does: GDAL's default (5 % of the
  // machine's memory) had made 2 000 points take 564 MiB, against 121 MiB at 32 MiB and the
  // same table. A GDAL_CACHEMAX the user set is kept.
  detail::start_gdal();
  std::optional<detail::GdalCacheScope> cache;
  if (!CPLGetConfigOption("GDAL_CACHEMAX", nullptr)) cache.emplace(std::int64_t(64) << 20);
  ExtractResult r;
  r.points = read_survey_points(request.points);
  r.notes = r.points.notes;
  {
    std::map<std::string, int> seen;
    for (const SurveyPoint& p : r.points.points)
      if (++seen[p.id] == 2) r.repeated_ids.push_back(p.id);
  }
  // Held until the table is written: no fill may replace what is read meanwhile.
  detail::FolderReadLocks reading;
  for (const std::string& path : request.covariates) reading.hold(path);
  std::vector<CovariateSeries> found = find_covariates(
      request.covariates, request.include_descriptors ? Descriptors::all : Descriptors::none, request.name_prefixes);
  // The table replaces neither the points it reads nor a layer: both would be lost.
  if (!request.out.empty() && std::filesystem::exists(request.out)) {
    auto same = [&](const std::string& path) {
      std::error_code ec;
      return std::filesystem::equivalent(request.out, path, ec);
    };
    if (same(request.points.path))
      throw UsageError("--out '" + request.out + "'", "is the points file itself; give the table another name");
    for (const CovariateSeries& s : found)
      for (const auto& f : s.files)
        if (same(f.path))
          throw UsageError("--out '" + request.out + "'", "is a file of the layer " + s.name + "; give the table another name");
    // Anything else there must be an earlier table of this command: a shapefile's .dbf, a
    // descriptor layer left out of the search or a summary would be lost.
    if (!is_extract_table(request.out))
      throw UsageError("--out '" + request.out + "'", "exists and is not a table kalends extract wrote; move it away or "
                                                     "give the table another name (nothing was replaced)");
  }
  r.series = select(std::move(found), request.layers, request.include_descriptors);
  // A points file without the default date column: fine for fixed layers, not for dated ones.
  if (r.points.date_name.empty() && !request.points.date_column.empty())
    for (const CovariateSeries& s : r.series)
      if (s.kind != SeriesKind::fixed)
        throw InputError(request.points.path,
                         fmt::format("no column '{}' (--date-column): the layer {} is dated and needs each survey's "
                                     "date (fixed layers alone need none)",
                                     request.points.date_column, s.name));
  require_distinct_columns(request, r);
  for (CovariateSeries& s : r.series) {
    std::vector<TimePoint> times;
    for (const SeriesFile& f : s.files) times.push_back(f.time);
    set_date_marks(s, resolve_date_marks(request.marks, times));
    if (!s.note.empty()) r.notes.push_back(s.name + ": " + s.note);
    // Hourly records: a survey day has many; which one it reads, and what a lag is, is said.
    if (s.kind == SeriesKind::dated)
      for (std::size_t i = 1; i < s.files.size(); ++i)
        if (s.files[i].time.seconds / 86400 == s.files[i - 1].time.seconds / 86400) {
          r.notes.push_back(s.name + ": several dates a day; a survey day reads the record that stands for its "
                            "first moment (00:00 UTC), and each lag steps back one record, not one day");
          break;
        }
    // Monthly means stamped on the month's last day, read as starts, are matched to the month
    // after: said, as `seasons` and `fill --every` say it (a survey in June had taken May's).
    if (s.kind == SeriesKind::dated && !s.period && request.marks == DateMarks::automatic)
      if (const std::string note = monthly_marks_note(times, "--date-marks start"); !note.empty())
        r.notes.push_back(s.name + ": " + note);
  }
  OGRSpatialReference points_crs;
  points_crs.importFromWkt(r.points.crs_wkt.c_str());
  points_crs.SetAxisMappingStrategy(OAMS_TRADITIONAL_GIS_ORDER);
  // One geometry per grid: the bands of one raster (Landsat's six) share their placements and
  // the cell centres the buffers transform.
  std::vector<std::unique_ptr<SeriesGeometry>> geometries;
  std::vector<std::size_t> geometry_of(r.series.size());
  for (std::size_t si = 0; si < r.series.size(); ++si) {
    const Grid& grid = r.series[si].grid;
    std::size_t same = 0;
    while (same < si && !(r.series[same].grid.width == grid.width && r.series[same].grid.height == grid.height &&
                          r.series[same].grid.geotransform == grid.geotransform &&
                          r.series[same].grid.crs_wkt == grid.crs_wkt))
      ++same;
    if (same == si) {
      geometry_of[si] = geometries.size();
      geometries.push_back(std::make_unique<SeriesGeometry>(r.series[si], points_crs, request.buffer_metres));
    } else {
      geometry_of[si] = geometry_of[same];
    }
  }
  // Matched first, read after: the reads go file by file, and in each file row by row, whatever
  // the order of the points. A survey table ordered by household has its dates at random; read
  // in that order, every point decompressed its own blocks again once the layers outgrew GDAL's
  // block cache (10k points: 12.6 s against 1.2 s sorted, with a 64 MB cache). Points are taken
  // in batches whose buffers' cells stay below `batch_cells` (a 5 km buffer on 30 m cells holds
  // 87 000 of them a point) and whose reads stay below `batch_reads`.
  constexpr std::size_t batch_cells = std::size_t(1) << 23;  // 64 MiB of cell pairs
  constexpr std::size_t batch_reads = std::size_t(1) << 22;  // 160 MiB of reads
  struct Read {
    std::size_t value;     // in r.values
    std::size_t si, file;  // series and its file
    int band;
    std::size_t site;      // in `placements` and `buffers`: the point on this series' grid
  };
  std::vector<Read> reads;
  std::vector<Placement> placements;
  std::vector<std::vector<std::pair<int, int>>> buffers;
  std::size_t cells_held = 0;
  Files files;
  // Per series: the values read from calendar periods that composites cover only in part (the
  // stack's first or last weeks, the edges of its season), and the first such period.
  std::map<std::size_t, std::pair<std::size_t, std::string>> partial_periods;
  // Per grid: the points placed on it, and those inside it. A survey whose every point falls
  // outside (x and y swapped, eastings as longitudes) had given an empty table, exit 0, with no hint.
  std::vector<std::pair<std::size_t, std::size_t>> placed_inside(geometries.size());
  const auto read_batch = [&] {
    std::stable_sort(reads.begin(), reads.end(), [&](const Read& a, const Read& b) {
      return std::tie(a.si, a.file, a.band, placements[a.site].py) <
             std::tie(b.si, b.file, b.band, placements[b.site].py);
    });
    for (const Read& read : reads) {
      const CovariateSeries& s = r.series[read.si];
      const SeriesFile& file = s.files[read.file];
      ExtractedValue& v = r.values[read.value];
      const Placement& at = placements[read.site];
      if (at.inside) {
        sample(files, s, file.path, read.band, at, request.sampling, v);
        if (!v.value && file.outside_season) v.reason = "outside the stack's season (no composite stands for these days)";
        if (v.value && s.period && file.days_covered > 0) {
          const auto [first, end] = s.period->span_of_day(file.time.seconds / 86400);
          if (file.days_covered < end - first) {
            auto& [count, example] = partial_periods[read.si];
            if (count++ == 0) example = fmt::format("{}: {} of {} days", file.time.label(), file.days_covered, end - first);
          }
        }
      } else {
        v.reason = at.reason;
      }
      if (request.buffer_metres > 0) {
        buffer_mean(files, s, file.path, read.band, buffers[read.site], v);
        if (!v.value && !v.buffer_mean) v.reason += " (and no cell with a value in the buffer)";
      }
    }
    reads.clear();
    placements.clear();
    buffers.clear();
    cells_held = 0;
  };
  for (std::size_t i = 0; i < r.points.points.size(); ++i) {
    const SurveyPoint& p = r.points.points[i];
    // The point on each grid, once (not once per layer on it: the geodesic distances of a
    // buffer's cells cost most).
    const std::size_t first_site = placements.size();
    for (std::size_t g = 0; g < geometries.size(); ++g) {
      placements.push_back(geometries[g]->place(p));
      const Placement& at = placements.back();
      placed_inside[g].first += p.has_coordinates;
      placed_inside[g].second += at.inside;
      // A point just outside the layer still has the cells of its buffer inside it.
      buffers.push_back(at.located && request.buffer_metres > 0 ? geometries[g]->buffer_cells(at)
                                                                 : std::vector<std::pair<int, int>>{});
      cells_held += buffers.back().size();
    }
    for (std::size_t si = 0; si < r.series.size(); ++si) {
      const CovariateSeries& s = r.series[si];
      const std::size_t site = first_site + geometry_of[si];
      const Placement& at = placements[site];
      const bool no_cells = buffers[site].empty();
      const int lags = s.kind == SeriesKind::fixed ? 0 : static_cast<int>(request.lags.size());
      for (int l = 0; l <= lags; ++l) {
        ExtractedValue v;
        v.point = i;
        v.series = si;
        v.lag = l ? request.lags[l - 1] : 0;
        const TimeMatch m = match_time(s, p, v.lag);
        v.matched = m.label;
        if (!at.located || (!at.inside && (m.file < 0 || no_cells))) v.reason = at.reason;
        else if (m.file < 0) v.reason = m.reason;
        else reads.push_back({r.values.size(), si, std::size_t(m.file), m.band, site});
        r.values.push_back(std::move(v));
      }
    }
    if (cells_held >= batch_cells || reads.size() >= batch_reads) read_batch();
  }
  read_batch();
  for (const ExtractedValue& v : r.values)
    if (!v.value) ++r.missing;
  // A period mean over a few covered days is not the period's mean (a month the stack's last
  // composite reaches by a day): said, as the files' KALENDS_PERIOD_DAYS_COVERED says it.
  for (const auto& [si, part] : partial_periods)
    r.notes.push_back(fmt::format("{}: {} value{} read from calendar periods that the composites cover only in part "
                                  "(first: {}); each file's KALENDS_PERIOD_DAYS_COVERED says how many days",
                                  r.series[si].name, part.first, part.first == 1 ? "" : "s", part.second));
  for (std::size_t g = 0; g < geometries.size(); ++g)
    if (placed_inside[g].first > 0 && placed_inside[g].second == 0) {
      std::size_t si = 0;
      while (geometry_of[si] != g) ++si;
      r.notes.push_back(fmt::format("{}: none of the {} located point{} of {} falls inside its grid ({} and {} "
                                    "swapped, or coordinates of another CRS than {}?)",
                                    r.series[si].name, placed_inside[g].first, placed_inside[g].first == 1 ? "" : "s",
                                    request.points.path, r.points.from_columns ? r.points.x_name : "x",
                                    r.points.from_columns ? r.points.y_name : "y",
                                    r.points.from_columns ? "--crs " + request.points.crs : "the file states"));
    }
  if (!r.repeated_ids.empty())
    r.notes.push_back(fmt::format("{}: {} id{} name{} more than one point (first: '{}'); each point keeps its own row",
                                  request.points.path, r.repeated_ids.size(), r.repeated_ids.size() == 1 ? "" : "s",
                                  r.repeated_ids.size() == 1 ? "s" : "", r.repeated_ids.front()));
  for (const CovariateSeries& s : r.series)
    if (!s.caution.empty() && std::find(r.cautions.begin(), r.cautions.end(), s.caution) == r.cautions.end())
      r.cautions.push_back(s.caution);
  if (!request.out.empty()) r.table_written = detail::write_text_atomically(request.out, write_table(request, r));
  return r;
}

}  // namespace kalends
