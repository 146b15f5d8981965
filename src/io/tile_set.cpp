// Tile sets and mosaics. A mosaic is a GDAL VRT per date that places each tile's raster at its
// pixel offset in a grid holding them all (GDAL's VRT format: https://gdal.org/drivers/raster/vrt.html);
// nothing is resampled, so a pixel read from the mosaic is the tile's pixel, bit for bit.
#include "kalends/tiles.hpp"

#include <cpl_string.h>
#include <ogr_spatialref.h>

#include <algorithm>
#include <cstring>
#include <cmath>
#include <filesystem>
#include <fmt/format.h>
#include <map>
#include <regex>
#include <set>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "io/majority.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/time.hpp"

namespace kalends {

namespace fs = std::filesystem;

namespace {

struct Placed {
  std::string path;
  Window window;
};

Grid header_of(const std::string& path) {
  GDALDatasetUniquePtr ds = detail::open_raster(path);
  Grid g;
  g.width = ds->GetRasterXSize();
  g.height = ds->GetRasterYSize();
  g.has_geotransform = ds->GetGeoTransform(g.geotransform.data()) == CE_None;
  if (const char* wkt = ds->GetProjectionRef()) g.crs_wkt = wkt;
  return g;
}

bool same_crs(const std::string& a, const std::string& b) {
  if (a == b) return true;
  if (a.empty() || b.empty()) return false;
  OGRSpatialReference sa, sb;
  if (sa.importFromWkt(a.c_str()) != OGRERR_NONE || sb.importFromWkt(b.c_str()) != OGRERR_NONE) return false;
  return sa.IsSame(&sb) != 0;
}

// The grid holding every raster of `grids`, and where each lies in it. Rasters must share the
// CRS and pixel size, have no rotation, and sit on the same pixel lattice.
Grid union_grid(const std::vector<std::pair<std::string, Grid>>& grids, std::vector<Window>& windows,
                const std::string& what) {
  const auto& [first_name, first] = grids.front();
  if (!first.has_geotransform)
    throw InputError(first_name, "has no georeferencing, so its place among the " + what + " is unknown");
  const auto& t0 = first.geotransform;
  if (t0[2] != 0 || t0[4] != 0) throw InputError(first_name, "is rotated; tiles must be north-up");
  double min_col = 0, min_row = 0, max_col = first.width, max_row = first.height;
  std::vector<std::pair<double, double>> offsets;
  for (const auto& [name, g] : grids) {
    const auto& t = g.geotransform;
    if (!g.has_geotransform) throw InputError(name, "has no georeferencing");
    if (!same_crs(g.crs_wkt, first.crs_wkt))
      throw InputError(name, "has a different CRS from " + first_name);
    if (t[2] != 0 || t[4] != 0) throw InputError(name, "is rotated; tiles must be north-up");
    if (std::abs(t[1] - t0[1]) > 1e-9 * std::abs(t0[1]) || std::abs(t[5] - t0[5]) > 1e-9 * std::abs(t0[5]))
      throw InputError(name, fmt::format("has pixels of {:g} x {:g}, unlike {} ({:g} x {:g})", t[1], -t[5],
                                         first_name, t0[1], -t0[5]));
    const double col = (t[0] - t0[0]) / t0[1], row = (t[3] - t0[3]) / t0[5];
    if (std::abs(col - std::round(col)) > 1e-6 || std::abs(row - std::round(row)) > 1e-6)
      throw InputError(name, fmt::format("is not aligned with the pixels of {} (offset {:.3f}, {:.3f} px)",
                                         first_name, col - std::round(col), row - std::round(row)));
    offsets.emplace_back(std::round(col), std::round(row));
    min_col = std::min(min_col, std::round(col));
    min_row = std::min(min_row, std::round(row));
    max_col = std::max(max_col, std::round(col) + g.width);
    max_row = std::max(max_row, std::round(row) + g.height);
  }
  Grid mosaic = first;
  mosaic.width = int(max_col - min_col);
  mosaic.height = int(max_row - min_row);
  mosaic.geotransform[0] = t0[0] + min_col * t0[1];
  mosaic.geotransform[3] = t0[3] + min_row * t0[5];
  windows.clear();
  for (std::size_t i = 0; i < grids.size(); ++i)
    windows.push_back(Window{int(offsets[i].first - min_col), int(offsets[i].second - min_row),
                             grids[i].second.width, grids[i].second.height});
  return mosaic;
}

std::string xml(const std::string& text) {
  char* escaped = CPLEscapeString(text.c_str(), -1, CPLES_XML);
  std::string s(escaped);
  CPLFree(escaped);
  return s;
}

// A <Metadata> element of the default domain's items, or "" when there are none.
std::string metadata_xml(char** items, const std::string& indent) {
  if (!items || !items[0]) return "";
  std::string s = indent + "<Metadata>\n";
  for (int i = 0; items[i]; ++i) {
    char* key = nullptr;
    const char* value = CPLParseNameValue(items[i], &key);
    if (key && value) s += indent + "  <MDI key=\"" + xml(key) + "\">" + xml(value) + "</MDI>\n";
    CPLFree(key);
  }
  return s + indent + "</Metadata>\n";
}

// VRT text placing `sources` in `mosaic`; bands, types, nodata, scale, offset, descriptions,
// units and dataset metadata are those of the first source. Source paths are written relative to
// the VRT so a folder can be moved as a whole.
std::string vrt_text(const Grid& mosaic, const std::vector<Placed>& sources, const std::string& vrt_path) {
  GDALDatasetUniquePtr first = detail::open_raster(sources.front().path);
  std::string s = fmt::format("<VRTDataset rasterXSize=\"{}\" rasterYSize=\"{}\">\n", mosaic.width, mosaic.height);
  if (!mosaic.crs_wkt.empty()) s += "  <SRS>" + xml(mosaic.crs_wkt) + "</SRS>\n";
  const auto& t = mosaic.geotransform;
  s += fmt::format("  <GeoTransform>{:.17g}, {:.17g}, {:.17g}, {:.17g}, {:.17g}, {:.17g}</GeoTransform>\n", t[0],
                   t[1], t[2], t[3], t[4], t[5]);
  s += metadata_xml(first->GetMetadata(), "  ");
  const fs::path vrt_folder = fs::absolute(vrt_path).parent_path();
  for (int b = 1; b <= first->GetRasterCount(); ++b) {
    GDALRasterBand* band = first->GetRasterBand(b);
    s += fmt::format("  <VRTRasterBand dataType=\"{}\" band=\"{}\">\n",
                     GDALGetDataTypeName(band->GetRasterDataType()), b);
    if (const char* d = band->GetDescription(); d && *d) s += "    <Description>" + xml(d) + "</Description>\n";
    int has = 0;
    const double nodata = band->GetNoDataValue(&has);
    if (has) s += fmt::format("    <NoDataValue>{}</NoDataValue>\n", std::isnan(nodata) ? "nan" : fmt::format("{:.17g}", nodata));
    if (const char* u = band->GetUnitType(); u && *u) s += "    <UnitType>" + xml(u) + "</UnitType>\n";
    const double offset = band->GetOffset(&has);
    if (has && offset != 0) s += fmt::format("    <Offset>{:.17g}</Offset>\n", offset);
    const double scale = band->GetScale(&has);
    if (has && scale != 1) s += fmt::format("    <Scale>{:.17g}</Scale>\n", scale);
    s += metadata_xml(band->GetMetadata(), "    ");
    for (const Placed& p : sources) {
      // A variable of a container file (NETCDF:"f.nc":ndvi) is named by its connection string,
      // which GDAL reads only as written: the file in it is made absolute instead.
      const auto connection = detail::connection_parts(p.path);
      const std::string source = connection ? connection->connection(fs::absolute(connection->files).string())
                                            : fs::absolute(p.path).lexically_relative(vrt_folder).string();
      const Window& w = p.window;
      s += "    <SimpleSource>\n";
      s += fmt::format("      <SourceFilename relativeToVRT=\"{}\">", connection ? 0 : 1) + xml(source) +
           "</SourceFilename>\n";
      s += fmt::format("      <SourceBand>{}</SourceBand>\n", b);
      s += fmt::format("      <SrcRect xOff=\"0\" yOff=\"0\" xSize=\"{}\" ySize=\"{}\"/>\n", w.width, w.height);
      s += fmt::format("      <DstRect xOff=\"{}\" yOff=\"{}\" xSize=\"{}\" ySize=\"{}\"/>\n", w.x, w.y, w.width,
                       w.height);
      s += "    </SimpleSource>\n";
    }
    s += "  </VRTRasterBand>\n";
  }
  s += "</VRTDataset>\n";
  return s;
}

// Values of `a` and `b` (placed at `wa`, `wb` in one grid) where they overlap; true when equal.
bool overlap_agrees(const std::string& a, const Window& wa, const std::string& b, const Window& wb) {
  const int x0 = std::max(wa.x, wb.x), y0 = std::max(wa.y, wb.y);
  const int x1 = std::min(wa.x + wa.width, wb.x + wb.width), y1 = std::min(wa.y + wa.height, wb.y + wb.height);
  if (x1 <= x0 || y1 <= y0) return true;
  GDALDatasetUniquePtr da = detail::open_raster(a), db = detail::open_raster(b);
  const int w = x1 - x0, h = y1 - y0;
  std::vector<double> va(std::size_t(w) * h), vb(va.size());
  for (int band = 1; band <= std::min(da->GetRasterCount(), db->GetRasterCount()); ++band) {
    if (da->GetRasterBand(band)->RasterIO(GF_Read, x0 - wa.x, y0 - wa.y, w, h, va.data(), w, h, GDT_Float64, 0, 0) !=
            CE_None ||
        db->GetRasterBand(band)->RasterIO(GF_Read, x0 - wb.x, y0 - wb.y, w, h, vb.data(), w, h, GDT_Float64, 0, 0) !=
            CE_None)
      throw InputError(a, "cannot read the overlap with " + b);
    for (std::size_t i = 0; i < va.size(); ++i)
      if (va[i] != vb[i] && !(std::isnan(va[i]) && std::isnan(vb[i]))) return false;
  }
  return true;
}

// Replaces the VRTs in `folder` by `wanted` (name -> text): writes new and changed ones,
// removes those no longer wanted.
// Writes the views `wanted` (name -> text) into `folder`, leaving one of the same text as it
// is; returns {written, unchanged}.
std::pair<int, int> publish_vrts(const std::string& folder, const std::map<std::string, std::string>& wanted) {
  std::error_code ec;
  fs::create_directories(folder, ec);
  if (ec) throw OutputError(folder, "cannot create the folder: " + ec.message());
  // Only dated views, as kalends names them: a VRT of the user's kept there is left alone.
  for (const auto& entry : fs::directory_iterator(folder, ec))
    if (entry.path().extension() == ".vrt" && !wanted.count(entry.path().filename().string()) &&
        find_date_in_name(entry.path().filename().string()))
      fs::remove(entry.path(), ec);
  std::pair<int, int> counts{0, 0};
  for (const auto& [name, text] : wanted) {
    const fs::path path = fs::path(folder) / name;
    if (fs::is_directory(path, ec))
      throw UsageError(path.string(), "is a folder where a mosaic view goes; move it away");
    // It leaves a file of the same text as it is, and says so.
    ++(detail::write_text_atomically(path.string(), text) ? counts.first : counts.second);
  }
  return counts;
}

}  // namespace

std::string tile_name_in(const std::string& path, const std::string& tile_field) {
  const auto field = tile_field.find("{tile}");
  if (field == std::string::npos) return "";
  auto literal = [](const std::string& text) {
    static const std::regex special(R"([.^$|()\[\]{}*+?\\])");
    return std::regex_replace(text, special, R"(\$&)");
  };
  const std::regex re(literal(tile_field.substr(0, field)) + "([^/]+?)" + literal(tile_field.substr(field + 6)));
  std::smatch m;
  if (!std::regex_search(path, m, re)) return "";
  return m[1].str();
}

// "no QA layer for 2031-03-22 in tile h00v00 (its QA files: 'tiles/*/qa_*.tif', tiles 'tiles/{tile}/')"
constexpr std::string_view tile_reason_start = "no QA layer for ", tile_reason_tile = " in tile ",
                           tile_reason_pattern = " (its QA files: '", tile_reason_field = "', tiles '",
                           tile_reason_end = "')";

std::string no_tile_partner(const std::string& label, const std::string& tile, const std::string& qa_pattern,
                            const std::string& tile_field) {
  return fmt::format("{}{}{}{}{}{}{}{}{}", tile_reason_start, label, tile_reason_tile, tile, tile_reason_pattern,
                     qa_pattern, tile_reason_field, tile_field, tile_reason_end);
}

bool tile_partner_now_present(const std::string& reason) {
  if (reason.rfind(tile_reason_start, 0) != 0 || !reason.ends_with(tile_reason_end)) return false;
  const auto tile_at = reason.find(tile_reason_tile);
  const auto pattern_at = tile_at == std::string::npos ? tile_at : reason.find(tile_reason_pattern, tile_at);
  const auto field_at = pattern_at == std::string::npos ? pattern_at : reason.rfind(tile_reason_field);
  if (field_at == std::string::npos || field_at < pattern_at) return false;
  const std::string label = reason.substr(tile_reason_start.size(), tile_at - tile_reason_start.size());
  const std::string tile =
      reason.substr(tile_at + tile_reason_tile.size(), pattern_at - tile_at - tile_reason_tile.size());
  const std::string pattern =
      reason.substr(pattern_at + tile_reason_pattern.size(), field_at - pattern_at - tile_reason_pattern.size());
  const std::string field = reason.substr(field_at + tile_reason_field.size(),
                                          reason.size() - tile_reason_end.size() - field_at - tile_reason_field.size());
  try {
    const auto connection = detail::connection_pattern(pattern);
    for (const std::string& file : detail::expand_glob(connection ? connection->files : pattern)) {
      const auto time = date_from_name(fs::path(file).filename().string());
      if (time && time->label() == label && tile_name_in(file, field) == tile) return true;
    }
  } catch (const Error&) {
    // The pattern matches nothing now: still missing.
  }
  return false;
}

TileSet TileSet::open(const std::string& pattern, const std::string& tile_field, const std::string& mosaic_dir,
                      const std::vector<std::string>& exclude) {
  detail::start_gdal();
  if (tile_field.find("{tile}") == std::string::npos)
    throw UsageError("--tiles '" + tile_field + "'", "needs a {tile} field, e.g. 'tiles/{tile}/'");
  // 'tiles/*/ndvi_*.tif', or one variable of container files: 'NETCDF:"tiles/*/*.nc":ndvi'.
  const auto connection = detail::connection_pattern(pattern);
  const std::vector<std::string> files = detail::expand_glob(connection ? connection->files : pattern);
  std::map<std::string, Tile> by_name;
  for (const std::string& path : files) {
    if (std::find(exclude.begin(), exclude.end(), path) != exclude.end()) continue;  // left out as bad
    const std::string name = tile_name_in(path, tile_field);
    if (name.empty()) throw InputError(path, "does not match the tile pattern '" + tile_field + "'");
    // Each tile's outputs go to OUT/<tile>/, beside OUT/mosaic/ and the hidden OUT/.mosaic/.
    if (name == "mosaic" || name.front() == '.')
      throw InputError(path, "is in a tile named '" + name + "', the name of the fill's own mosaic folder; rename "
                                                           "the tile");
    by_name[name].name = name;
    by_name[name].files.push_back(connection ? connection->connection(path) : path);
  }
  TileSet set;
  std::vector<std::pair<std::string, Grid>> grids;
  for (auto& [name, tile] : by_name) {
    // Each file against the grid most of the tile's files share (the first's without a
    // majority), so that an odd first file is the one named.
    std::vector<Grid> headers;
    for (const std::string& f : tile.files) headers.push_back(header_of(f));
    auto same_grid = [](const Grid& a, const Grid& b) {
      return a.width == b.width && a.height == b.height && a.geotransform == b.geotransform;
    };
    const std::size_t reference = detail::most_shared(headers, same_grid).first;
    const Grid& g = headers[reference];
    const std::string& from = tile.files[reference];
    for (std::size_t i = 0; i < headers.size(); ++i) {
      if (!same_grid(headers[i], g))
        throw InputError(tile.files[i], "lies on a different grid from the other files of tile " + name + " (" + from + ")");
      if (!same_crs(headers[i].crs_wkt, g.crs_wkt))
        throw InputError(tile.files[i], "has a different CRS from the other files of tile " + name + " (" + from + ")");
    }
    grids.emplace_back(from, g);
    set.tiles.push_back(tile);
  }
  if (set.tiles.empty()) throw InputError(pattern, "no file matches this pattern");
  std::vector<Window> windows;
  set.mosaic = union_grid(grids, windows, "tiles");
  for (std::size_t i = 0; i < set.tiles.size(); ++i) set.tiles[i].window = windows[i];
  // Dates: each tile at most once per date.
  std::map<std::string, std::vector<Placed>> by_date;  // label -> sources
  std::map<std::string, std::string> vrt_name;         // label -> file name
  for (std::size_t i = 0; i < set.tiles.size(); ++i) {
    std::set<std::string> seen;
    for (const std::string& f : set.tiles[i].files) {
      const std::string base = fs::path(detail::file_in_connection(f)).filename().string();
      const auto date = find_date_in_name(base);
      if (!date) throw InputError(f, "has no date in its name");
      const std::string label = date->time.label();
      if (!seen.insert(label).second)
        throw InputError(f, "is a second file for " + label + " in tile " + set.tiles[i].name);
      by_date[label].push_back({f, set.tiles[i].window});
      if (!vrt_name.count(label)) {
        std::string stem = fs::path(base).stem().string();
        if (const auto at = stem.find(set.tiles[i].name); at != std::string::npos) {
          stem.erase(at, set.tiles[i].name.size());
          for (const char* twice : {"__", "--", ".."})
            if (const auto dup = stem.find(twice); dup != std::string::npos) stem.erase(dup, 1);
          while (!stem.empty() && std::strchr("_-.", stem.front())) stem.erase(0, 1);
        }
        vrt_name[label] = stem + ".vrt";
      }
    }
  }
  for (const auto& [label, sources] : by_date)
    if (sources.size() < set.tiles.size())
      for (const Tile& tile : set.tiles)
        if (std::none_of(sources.begin(), sources.end(), [&](const Placed& p) { return p.window == tile.window; }))
          set.missing.push_back(tile.name + " " + label);
  // Overlapping tiles must agree where they overlap (checked on the first date they share).
  for (std::size_t i = 0; i < set.tiles.size(); ++i)
    for (std::size_t j = i + 1; j < set.tiles.size(); ++j) {
      const Window &a = set.tiles[i].window, &b = set.tiles[j].window;
      if (a.x >= b.x + b.width || b.x >= a.x + a.width || a.y >= b.y + b.height || b.y >= a.y + a.height) continue;
      for (const auto& [label, sources] : by_date) {
        const auto fa = std::find_if(sources.begin(), sources.end(), [&](const Placed& p) { return p.window == a; });
        const auto fb = std::find_if(sources.begin(), sources.end(), [&](const Placed& p) { return p.window == b; });
        if (fa == sources.end() || fb == sources.end()) continue;
        if (!overlap_agrees(fa->path, a, fb->path, b))
          throw InputError(fb->path, "overlaps tile " + set.tiles[i].name + " with different values (" + fa->path + ")");
        break;
      }
    }
  std::map<std::string, std::string> wanted;
  for (const auto& [label, sources] : by_date) {
    const std::string path = (fs::path(mosaic_dir) / vrt_name[label]).string();
    if (wanted.count(vrt_name[label]))
      throw InputError(sources.front().path, "two dates give the same mosaic name " + vrt_name[label]);
    wanted[vrt_name[label]] = vrt_text(set.mosaic, sources, path);
  }
  publish_vrts(mosaic_dir, wanted);
  set.pattern = (fs::path(detail::glob_escape(mosaic_dir)) / "*.vrt").string();
  return set;
}

std::pair<int, int> write_mosaics(const std::vector<std::string>& folders, const std::string& mosaic_dir) {
  detail::start_gdal();
  if (folders.empty()) return {0, 0};
  // Every raster below the first folder (calendar subfolders too), matched by relative path.
  std::map<std::string, std::map<std::string, std::string>> wanted;  // subfolder -> name -> text
  std::error_code ec;
  for (const auto& entry : fs::recursive_directory_iterator(folders.front(), ec)) {
    if (!entry.is_regular_file() || entry.path().extension() != ".tif") continue;
    const std::string name = entry.path().filename().string();
    if (name.front() == '.') continue;
    const fs::path relative = entry.path().lexically_relative(folders.front());
    std::vector<std::pair<std::string, Grid>> grids;
    for (const std::string& folder : folders) {
      const fs::path p = fs::path(folder) / relative;
      if (fs::exists(p)) grids.emplace_back(p.string(), header_of(p.string()));
    }
    std::vector<Window> windows;
    const Grid mosaic = union_grid(grids, windows, "tiles");
    std::vector<Placed> sources;
    for (std::size_t i = 0; i < grids.size(); ++i) sources.push_back({grids[i].first, windows[i]});
    const fs::path target_dir = fs::path(mosaic_dir) / relative.parent_path();
    const std::string vrt = (fs::path(relative.stem().string() + ".vrt")).string();
    wanted[target_dir.string()][vrt] = vrt_text(mosaic, sources, (target_dir / vrt).string());
  }
  std::pair<int, int> counts{0, 0};
  for (const auto& [folder, vrts] : wanted) {
    const auto [written, unchanged] = publish_vrts(folder, vrts);
    counts.first += written;
    counts.second += unchanged;
  }
  return counts;
}

}  // namespace kalends
