// Survey points from a CSV table (coordinates in two columns, in a CRS given by the user,
// WGS 84 by default) or from any OGR vector source with point geometries (its own CRS).
#include <ogrsf_frmts.h>

#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <regex>

#include <fmt/format.h>

#include "io/gdal_session.hpp"
#include "kalends/error.hpp"
#include "kalends/extract.hpp"

namespace kalends {

namespace {

std::string lower(std::string s) {
  for (char& c : s) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return s;
}

std::string trim(const std::string& s) {
  const auto a = s.find_first_not_of(" \t\r\n");
  if (a == std::string::npos) return "";
  return s.substr(a, s.find_last_not_of(" \t\r\n") - a + 1);
}

int field_index(OGRFeatureDefn& defn, const std::string& column, const std::string& option,
                const std::string& path) {
  const int i = defn.GetFieldIndex(column.c_str());
  if (i >= 0) return i;
  std::string names;
  for (int k = 0; k < defn.GetFieldCount(); ++k) names += (k ? ", " : "") + std::string(defn.GetFieldDefn(k)->GetNameRef());
  throw InputError(path, "no column '" + column + "' (" + option + "); the columns are: " + names);
}

double coordinate(const std::string& text, const std::string& where) {
  char* end = nullptr;
  const double v = std::strtod(text.c_str(), &end);
  if (end == text.c_str() || *end != '\0' || !std::isfinite(v))
    throw InputError(where, "'" + text + "' is not a coordinate");
  return v;
}

// YYYY-MM-DD or YYYY-MM (also with '/', as OGR prints date fields), optionally a time after.
void read_date(SurveyPoint& p, const std::string& where) {
  static const std::regex pattern(R"((\d{4})[-/](\d{1,2})(?:[-/](\d{1,2}))?(?:[T ].*)?)");
  std::smatch m;
  if (!std::regex_match(p.date_text, m, pattern))
    throw InputError(where, "'" + p.date_text + "' is not a date (YYYY-MM-DD or YYYY-MM)");
  const int year = std::stoi(m[1]), month = std::stoi(m[2]);
  p.month_only = !m[3].matched;
  const int day = p.month_only ? 15 : std::stoi(m[3]);
  if (!is_valid_date(year, month, day))
    throw InputError(where, "'" + p.date_text + "' is not a valid date");
  p.date = CivilDate{year, month, day};
}

}  // namespace

SurveyPoints read_survey_points(const PointsSource& source) {
  detail::start_gdal();
  const std::string path = source.path;
  const bool csv = lower(std::filesystem::path(path).extension().string()) == ".csv";
  if (!std::filesystem::exists(path)) throw InputError(path, "no such file");
  CPLErrorReset();
  GDALDatasetUniquePtr ds(GDALDataset::Open(path.c_str(), GDAL_OF_VECTOR | GDAL_OF_READONLY));
  if (!ds || ds->GetLayerCount() < 1)
    throw InputError(path, "cannot open as a table of points (" + detail::gdal_message("unknown format") + ")");
  OGRLayer* layer = ds->GetLayer(0);
  OGRFeatureDefn& defn = *layer->GetLayerDefn();
  const int id = field_index(defn, source.id_column, "--id-column", path);
  const int date = source.date_column.empty() ? -1 : field_index(defn, source.date_column, "--date-column", path);
  int x = -1, y = -1;
  SurveyPoints result;
  result.from_columns = csv;
  OGRSpatialReference crs;
  if (csv) {
    x = field_index(defn, source.x_column, "--x-column", path);
    y = field_index(defn, source.y_column, "--y-column", path);
  }
  if (!csv && layer->GetSpatialRef()) {
    crs = *layer->GetSpatialRef();
  } else if (crs.SetFromUserInput(source.crs.c_str()) != OGRERR_NONE) {
    throw UsageError("--crs '" + source.crs + "'", "not a CRS PROJ knows");
  }
  char* wkt = nullptr;
  crs.exportToWkt(&wkt);
  result.crs_wkt = wkt ? wkt : "";
  CPLFree(wkt);
  layer->ResetReading();
  int row = 1;  // the header is row 1 of a CSV
  for (auto& feature : *layer) {
    ++row;
    const std::string where = path + (csv ? ":" + std::to_string(row) : " feature " + std::to_string(feature->GetFID()));
    SurveyPoint p;
    p.id = feature->GetFieldAsString(id);
    if (csv) {
      const std::string xs = trim(feature->GetFieldAsString(x)), ys = trim(feature->GetFieldAsString(y));
      p.x_text = xs;
      p.y_text = ys;
      // Both empty: a point not yet located (its values say so). One alone is a mistake, such
      // as a row cut short.
      if (xs.empty() != ys.empty())
        throw InputError(where, fmt::format("has {} '{}' but no {}", xs.empty() ? source.y_column : source.x_column,
                                            xs.empty() ? ys : xs, xs.empty() ? source.x_column : source.y_column));
      if (xs.empty() || ys.empty()) p.has_coordinates = false;
      else {
        p.x = coordinate(xs, where);
        p.y = coordinate(ys, where);
        // In degrees, a latitude beyond the poles is a typing slip or swapped columns.
        if (crs.IsGeographic() && std::abs(p.y) > 90)
          throw InputError(where, fmt::format("{} {} is beyond ±90 degrees (a slip, or {} and {} swapped?)",
                                              source.y_column, ys, source.x_column, source.y_column));
        if (crs.IsGeographic() && std::abs(p.x) > 360)
          throw InputError(where, fmt::format("{} {} is beyond ±360 degrees", source.x_column, xs));
      }
    } else {
      const OGRGeometry* g = feature->GetGeometryRef();
      if (!g || g->IsEmpty()) p.has_coordinates = false;
      else if (wkbFlatten(g->getGeometryType()) != wkbPoint)
        throw InputError(where, std::string("a ") + g->getGeometryName() + ", not a point");
      else {
        p.x = g->toPoint()->getX();
        p.y = g->toPoint()->getY();
      }
    }
    if (date >= 0 && feature->IsFieldSetAndNotNull(date)) {
      p.date_text = trim(feature->GetFieldAsString(date));
      if (!p.date_text.empty()) read_date(p, where);
    }
    result.points.push_back(std::move(p));
  }
  if (result.points.empty()) throw InputError(path, "no points");
  return result;
}

}  // namespace kalends
