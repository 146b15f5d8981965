// kalends report: the page is built from what the folder holds. Layers come from
// find_covariates (covariates.hpp); validation reports are the report.md files `kalends
// validate` writes beside report.json; fill statistics are the fill-summary.json files; the
// time series read each fill output's value, sd and flag at a pixel, the observation from the
// file named in KALENDS_SOURCE, and the synoptic mean of a seasons step whose KALENDS_INPUT is
// that fill folder.
#include "kalends/report.hpp"

#include <fmt/format.h>
#include <nlohmann/json.hpp>

#include <algorithm>
#include <chrono>
#include <cmath>
#include <filesystem>
#include <fstream>
#include <map>
#include <optional>
#include <regex>
#include <sstream>

#include "io/file_glob.hpp"
#include "io/folder_read_lock.hpp"
#include "io/gdal_session.hpp"
#include "io/output_set.hpp"
#include "kalends/covariates.hpp"
#include "kalends/error.hpp"
#include "kalends/percent.hpp"
#include "report/colour_ramp.hpp"
#include "report/quicklook.hpp"
#include "report/time_series_plot.hpp"

namespace kalends {

namespace fs = std::filesystem;
using namespace detail;

namespace {

// Text in the page, which says it is UTF-8: a byte that is not part of a valid UTF-8 sequence
// (a folder named in Latin-1) becomes U+FFFD, as do control characters other than white space.
std::string valid_utf8(const std::string& s) {
  std::string out;
  for (std::size_t i = 0; i < s.size();) {
    const auto b = static_cast<unsigned char>(s[i]);
    const int length = b < 0x80 ? 1 : (b >> 5) == 0x6 ? 2 : (b >> 4) == 0xe ? 3 : (b >> 3) == 0x1e ? 4 : 0;
    bool ok = length > 0 && i + length <= s.size();
    for (int k = 1; ok && k < length; ++k) ok = (static_cast<unsigned char>(s[i + k]) >> 6) == 0x2;
    if (!ok) {
      out += "\xEF\xBF\xBD";
      ++i;
      continue;
    }
    if (length == 1 && (b < 0x20 || b == 0x7f) && b != '\n' && b != '\t' && b != '\r') out += "\xEF\xBF\xBD";
    else out.append(s, i, std::size_t(length));
    i += std::size_t(length);
  }
  return out;
}

std::string escape(const std::string& raw) {
  const std::string s = valid_utf8(raw);
  std::string out;
  for (char c : s) {
    switch (c) {
      case '&': out += "&amp;"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '"': out += "&quot;"; break;
      default: out += c;
    }
  }
  return out;
}

std::string read_file(const fs::path& p) {
  std::ifstream in(p);
  std::stringstream s;
  s << in.rdbuf();
  return s.str();
}

std::string metadata_item(const std::string& path, const char* key) {
  GDALDatasetUniquePtr ds = open_raster(path);
  const char* v = ds->GetMetadataItem(key);
  return v ? v : "";
}

std::string canonical_text(const fs::path& p) {
  std::error_code ec;
  const fs::path c = fs::weakly_canonical(p, ec);
  return ec ? p.lexically_normal().string() : c.string();
}

// `number` makes the gradient's id unique in the page, and the same from run to run, so that a
// report of unchanged outputs is the same file.
std::string legend_svg(const Quicklook& q, const std::string& unit, int number) {
  std::string stops;
  for (int i = 0; i <= 10; ++i)
    stops += fmt::format("<stop offset=\"{}%\" stop-color=\"{}\"/>", i * 10, hex(viridis(i / 10.0)));
  const std::string id = fmt::format("ramp{}", number);
  // Cells beyond the stretch take the end colours: the ends say so, and the range is given
  // (a count layer of 3 years almost everywhere and 0 at six pixels had read "3 .. 3").
  const bool below = q.minimum < q.low, above = q.maximum > q.high;
  const std::string range =
      below || above ? fmt::format("<text x=\"130\" y=\"42\" text-anchor=\"middle\">cells range {:.4g} to {:.4g}</text>",
                                   q.minimum, q.maximum)
                     : std::string();
  // Its name is what a screen reader reads of it (role="img" hides the text inside).
  const std::string name = fmt::format("colour scale from {}{:.4g} to {}{:.4g} {}{}", below ? "at most " : "", q.low,
                                       above ? "at least " : "", q.high, unit.empty() ? "(no unit)" : unit,
                                       below || above ? fmt::format("; cells range {:.4g} to {:.4g}", q.minimum, q.maximum)
                                                      : std::string());
  return fmt::format(
      "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"260\" height=\"{5}\" class=\"legend\" role=\"img\" "
      "aria-label=\"{9}\">"
      "<defs><linearGradient id=\"{0}\">{1}</linearGradient></defs>"
      "<rect x=\"5\" y=\"2\" width=\"250\" height=\"12\" fill=\"url(#{0})\" stroke=\"#999\"/>"
      "<g font-family=\"sans-serif\" font-size=\"11\" fill=\"#333\"><text x=\"5\" y=\"28\">{6}{2:.4g}</text>"
      "<text x=\"130\" y=\"28\" text-anchor=\"middle\">{4}</text>"
      "<text x=\"255\" y=\"28\" text-anchor=\"end\">{7}{3:.4g}</text>{8}</g></svg>",
      id, stops, q.low, q.high, escape(unit.empty() ? "(no unit)" : unit), range.empty() ? 34 : 46,
      below ? "&#8804; " : "", above ? "&#8805; " : "", range, escape(name));
}

// A calendar period's flags mean other things than a date's, and 1 never occurs there
// (outputs.md): its legend had read "0 observed, kept" for a period mean of the fitted curve.
std::string flag_legend(bool calendar_period) {
  const char* date_names[4] = {"observed, kept", "observed, rejected", "filled", "not filled"};
  const char* period_names[4] = {"an observation kept inside the period", "", "none (the period mean of the curve)",
                                 "no value"};
  std::string out = "<div class=\"flag-legend\">";
  for (int f = 0; f < 4; ++f)
    if (!calendar_period || f != 1)
      out += fmt::format("<span><i style=\"background:{}\"></i>{} {}</span>", hex(flag_colour(f)), f,
                         calendar_period ? period_names[f] : date_names[f]);
  return out + "</div>";
}

// A band's classes from its CLASS_MEANINGS item ("0: under 25 % ..., 1: 25-50 %, 2: ..."), in
// order from 0; empty where it has none or they are not 0, 1, 2, ...
std::vector<std::string> class_meanings(const std::string& path, int band) {
  std::vector<std::string> classes;
  GDALDatasetUniquePtr ds = open_raster(path);
  if (band < 1 || band > ds->GetRasterCount()) return classes;
  const char* text = ds->GetRasterBand(band)->GetMetadataItem("CLASS_MEANINGS");
  if (!text) return classes;
  const std::string all = text;
  // Each class starts with "<k>: " at the start or after ", ".
  std::size_t at = 0;
  while (at < all.size()) {
    const std::string label = std::to_string(classes.size()) + ": ";
    if (all.compare(at, label.size(), label) != 0) return {};
    const std::size_t from = at + label.size();
    const std::string next = ", " + std::to_string(classes.size() + 1) + ": ";
    const std::size_t end = all.find(next, from);
    classes.push_back(all.substr(from, end == std::string::npos ? std::string::npos : end - from));
    at = end == std::string::npos ? all.size() : end + 2;
  }
  return classes;
}

std::string class_legend(const std::vector<std::string>& classes) {
  std::string out = "<div class=\"flag-legend\">";
  for (std::size_t k = 0; k < classes.size(); ++k)
    out += fmt::format("<span><i style=\"background:{}\"></i>{} {}</span>",
                       hex(class_colour(int(k), int(classes.size()))), k, escape(classes[k]));
  return out + "</div>";
}

std::string image(const Quicklook& q, const std::string& alt) {
  // A small layer (a 20 x 20 px trial) had been drawn as a speck: shown a whole number of times
  // larger, up to about 256 px, its cells kept sharp (image-rendering: pixelated).
  const int largest = std::max(q.width, q.height);
  const int times = largest > 0 && largest < 128 ? std::max(1, 256 / largest) : 1;
  return fmt::format("<img class=\"map\" width=\"{}\" height=\"{}\" alt=\"{}\" src=\"data:image/png;base64,{}\">",
                     q.width * times, q.height * times, escape(alt), q.png_base64);
}

// Markdown tables, headings and paragraphs of a validate report, as HTML.
std::string markdown_to_html(const std::string& md) {
  // Escaped text with `code` spans as <code> (the backticks had been shown as they are).
  auto inline_html = [](const std::string& text) {
    static const std::regex code("`([^`]*)`");
    return std::regex_replace(escape(text), code, "<code>$1</code>");
  };
  std::string out, line;
  std::istringstream in(md);
  bool in_table = false, header_row = false;
  auto cells = [](const std::string& row) {
    std::vector<std::string> c;
    std::string rest = row.substr(1);
    while (!rest.empty()) {
      const auto bar = rest.find('|');
      std::string cell = rest.substr(0, bar);
      const auto a = cell.find_first_not_of(' '), b = cell.find_last_not_of(' ');
      c.push_back(a == std::string::npos ? "" : cell.substr(a, b - a + 1));
      if (bar == std::string::npos) break;
      rest = rest.substr(bar + 1);
    }
    if (!c.empty() && c.back().empty()) c.pop_back();
    return c;
  };
  while (std::getline(in, line)) {
    if (!line.empty() && line[0] == '|') {
      if (!in_table) out += "<table>\n", in_table = true, header_row = true;
      if (line.find("---") != std::string::npos) continue;
      out += "<tr>";
      for (const std::string& c : cells(line)) out += (header_row ? "<th>" : "<td>") + inline_html(c) + (header_row ? "</th>" : "</td>");
      out += "</tr>\n";
      header_row = false;
      continue;
    }
    if (in_table) out += "</table>\n", in_table = false;
    if (line.empty()) continue;
    int level = 0;
    while (level < int(line.size()) && line[level] == '#') ++level;
    if (level > 0) out += fmt::format("<h4>{}</h4>\n", inline_html(line.substr(level + (line.size() > std::size_t(level) ? 1 : 0))));
    else out += "<p>" + inline_html(line) + "</p>\n";
  }
  if (in_table) out += "</table>\n";
  return out;
}

std::string fill_statistics_html(const fs::path& summary, const fs::path& root) {
  // Read as JSON (a regular expression had cut strings at an escaped quote, the NetCDF input
  // 'NETCDF:"x.nc":tas' shown as 'NETCDF:\', and skipped the nested series_not_fitted).
  // One summary kalends cannot read (an older version wrote a file name's Latin-1 bytes raw)
  // is said in its place; the page is still made.
  nlohmann::ordered_json v;
  std::string problem;
  try {
    v = nlohmann::ordered_json::parse(read_file(summary));
    if (!v.is_object()) problem = "not a JSON object";
  } catch (const nlohmann::json::exception& e) {
    problem = e.what();
  }
  // The parser quotes what it last read, raw: bytes beyond ASCII out, since the page is UTF-8.
  for (char& c : problem)
    if (static_cast<unsigned char>(c) >= 0x80) c = '?';
  if (!problem.empty())
    return fmt::format("<h3>{}</h3>\n<p class=\"note\">Not a readable fill summary ({}).</p>\n",
                       escape(fs::relative(summary, root).string()), escape(problem));
  const double total = v.contains("pixel_dates") && v["pixel_dates"].is_number() ? v["pixel_dates"].get<double>() : 0;
  auto text_of = [](const nlohmann::ordered_json& value) -> std::string {
    if (value.is_string()) return value.get<std::string>();
    if (value.is_array()) {
      std::string joined;
      for (const auto& item : value) joined += (joined.empty() ? "" : " x ") + (item.is_string() ? item.get<std::string>() : item.dump());
      return joined;
    }
    return value.dump();
  };
  std::string out = fmt::format("<h3>{}</h3>\n<table class=\"stats\"><tr><th>item</th><th>value</th><th>share of pixel-dates</th></tr>\n",
                                escape(fs::relative(summary, root).string()));
  for (const auto& [key, value] : v.items()) {
    if (value.is_object()) {
      // series_not_fitted (reason: pixels), spacetime's chosen smoothing (name: value): a row each.
      for (const auto& [inner, item] : value.items())
        out += fmt::format("<tr><td>{}: {}</td><td>{}</td><td></td></tr>\n", escape(key), escape(inner), escape(text_of(item)));
      if (value.empty()) out += fmt::format("<tr><td>{}</td><td>none</td><td></td></tr>\n", escape(key));
      continue;
    }
    std::string share;
    if (total > 0 && value.is_number() &&
        (key == "observed" || key == "missing" || key == "masked_by_qa" || key == "rejected" || key == "filled" ||
         key == "unfilled"))
      share = percent_text(value.get<double>() / total);
    out += fmt::format("<tr><td>{}</td><td>{}</td><td>{}</td></tr>\n", escape(key), escape(text_of(value)), escape(share));
  }
  return out + "</table>\n";
}

// The pixels to plot: the user's that lie on the grid, or `count` spread over the grid on a
// k x k lattice.
std::vector<std::pair<int, int>> sample_pixels(const ReportRequest& r, const Grid& grid) {
  if (!r.pixels.empty()) {
    std::vector<std::pair<int, int>> inside;
    for (auto [c, row] : r.pixels)
      if (c >= 0 && row >= 0 && c < grid.width && row < grid.height) inside.emplace_back(c, row);
    return inside;
  }
  int k = 1;
  while (k * k < r.samples) ++k;
  std::vector<std::pair<int, int>> out;
  for (int j = 0; j < k && int(out.size()) < r.samples; ++j)
    for (int i = 0; i < k && int(out.size()) < r.samples; ++i)
      out.emplace_back(int((i + 0.5) / k * grid.width), int((j + 0.5) / k * grid.height));
  return out;
}

double read_pixel(GDALDataset& ds, int band, int col, int row) {
  GDALRasterBand* b = ds.GetRasterBand(band);
  if (!b) return NAN;
  double v = NAN;
  // A file that opens but cannot be read (cut short) had been drawn and counted as a cell
  // without a value (exit 0), as a real gap is; every other command refuses it.
  CPLErrorReset();
  if (b->RasterIO(GF_Read, col, row, 1, 1, &v, 1, 1, GDT_Float64, 0, 0) != CE_None)
    detail::throw_read_failed(ds.GetDescription());
  int has_nodata = 0;
  const double nodata = b->GetNoDataValue(&has_nodata);
  if (std::isnan(v) || (has_nodata && v == nodata)) return NAN;
  return v * b->GetScale() + b->GetOffset();
}

struct Plots {
  std::string html;
  int count = 0;
  std::vector<std::string> notes;
};

// The pixel of a fill output's raw source that lies under the output's pixel (c, r): the same
// where the two grids are one; else through both geotransforms (a tile's outputs name the
// mosaic of all the tiles as their source). None where it falls outside the source.
std::optional<std::pair<int, int>> source_pixel(GDALDataset& output, GDALDataset& source, int c, int r) {
  double a[6], b[6];
  const bool georeferenced = output.GetGeoTransform(a) == CE_None && source.GetGeoTransform(b) == CE_None;
  const bool same = !georeferenced || (std::equal(a, a + 6, b) && output.GetRasterXSize() == source.GetRasterXSize() &&
                                       output.GetRasterYSize() == source.GetRasterYSize());
  if (same) return std::pair{c, r};
  const double x = a[0] + (c + 0.5) * a[1] + (r + 0.5) * a[2], y = a[3] + (c + 0.5) * a[4] + (r + 0.5) * a[5];
  const double det = b[1] * b[5] - b[2] * b[4];
  if (det == 0) return std::nullopt;
  const double dx = x - b[0], dy = y - b[3];
  const int sc = int(std::floor((b[5] * dx - b[2] * dy) / det)), sr = int(std::floor((-b[4] * dx + b[1] * dy) / det));
  if (sc < 0 || sr < 0 || sc >= source.GetRasterXSize() || sr >= source.GetRasterYSize()) return std::nullopt;
  return std::pair{sc, sr};
}

// The pixels of a validation's series.csv (written by kalends validate beside its report.md):
// one plot each of the truth, kept and withheld, and every scored curve, with the RMSE of each
// on that pixel's withheld values. A file not in validate's layout is named, not drawn.
}  // namespace

std::pair<int, int> parse_pixel(const std::string& text, const std::string& where) {
  static const std::regex column_row(R"(\s*(\d{1,9})\s*(?:,|\s)\s*(\d{1,9})\s*)");
  std::smatch m;
  if (!std::regex_match(text, m, column_row))
    throw UsageError(where + " '" + text + "'",
                     "expected COLUMN,ROW (or COLUMN ROW), two whole numbers of 0 or more (pixels from the first row and "
                     "column of the file: the top left of a north-up grid)");
  return {std::stoi(m[1]), std::stoi(m[2])};
}

namespace {

Plots validation_series_html(const fs::path& csv, const fs::path& root) {
  Plots plots;
  std::istringstream in(read_file(csv));
  std::string line;
  std::getline(in, line);
  auto split = [](const std::string& text) {
    std::vector<std::string> cells;
    std::size_t start = 0;
    for (std::size_t comma; (comma = text.find(',', start)) != std::string::npos; start = comma + 1)
      cells.push_back(text.substr(start, comma - start));
    cells.push_back(text.substr(start));
    return cells;
  };
  const std::vector<std::string> header = split(line);
  const std::string name = escape(fs::relative(csv, root).string());
  if (header.size() < 6 || header[0] != "column" || header[1] != "row" || header[2] != "date" || header[3] != "truth" ||
      header[4] != "withheld")
    return {fmt::format("<p class=\"note\">{}: not the layout kalends validate writes; not drawn.</p>\n", name), 0, {}};
  std::vector<std::size_t> curve_columns;  // values, not their sd
  for (std::size_t c = 5; c < header.size(); ++c)
    if (!header[c].ends_with("_sd")) curve_columns.push_back(c);
  auto number = [](const std::string& cell) { return cell.empty() ? NAN : std::strtod(cell.c_str(), nullptr); };
  std::vector<std::pair<std::pair<int, int>, ValidationPlot>> pixels;
  while (std::getline(in, line)) {
    const std::vector<std::string> cells = split(line);
    if (cells.size() != header.size()) continue;
    // A date label, "YYYY-MM-DD" or, off midnight, "YYYY-MM-DDTHHMM".
    std::optional<TimePoint> when = date_from_name(cells[2]);
    if (!when) continue;
    if (cells[2].size() == 15 && cells[2][10] == 'T')
      when->seconds += 3600 * std::atoi(cells[2].substr(11, 2).c_str()) + 60 * std::atoi(cells[2].substr(13, 2).c_str());
    const std::pair<int, int> at{std::atoi(cells[0].c_str()), std::atoi(cells[1].c_str())};
    if (pixels.empty() || pixels.back().first != at) {
      pixels.push_back({at, {}});
      for (std::size_t c : curve_columns) pixels.back().second.curves.push_back({header[c], {}});
    }
    ValidationPlot& plot = pixels.back().second;
    plot.days.push_back(when->days());
    plot.truth.push_back(number(cells[3]));
    plot.withheld.push_back(cells[4] == "1");
    for (std::size_t k = 0; k < curve_columns.size(); ++k) plot.curves[k].second.push_back(number(cells[curve_columns[k]]));
  }
  for (const auto& [at, plot] : pixels) {
    int withheld = 0;
    for (std::size_t t = 0; t < plot.days.size(); ++t) withheld += plot.withheld[t] && std::isfinite(plot.truth[t]);
    std::string scores;
    for (const auto& [label, values] : plot.curves) {
      double squares = 0;
      int covered = 0;
      for (std::size_t t = 0; t < plot.days.size(); ++t)
        if (plot.withheld[t] && std::isfinite(plot.truth[t]) && std::isfinite(values[t]))
          squares += (values[t] - plot.truth[t]) * (values[t] - plot.truth[t]), ++covered;
      scores += fmt::format("{}{} {}", scores.empty() ? "" : ", ", escape(label),
                            covered ? fmt::format("{:.4f}", std::sqrt(squares / covered)) : std::string("-"));
      if (covered > 0 && covered < withheld) scores += fmt::format(" ({} of them)", covered);
    }
    plots.html += fmt::format("<figure class=\"series\"><figcaption>{}, pixel column {}, row {}: {} value{} "
                              "withheld; RMSE on them: {}</figcaption>\n{}</figure>\n",
                              name, at.first, at.second, withheld, withheld == 1 ? "" : "s", scores,
                              validation_svg(plot, "", fmt::format("{}: the truth and each method's values at pixel column {}, row {}",
                                                                   name, at.first, at.second)));
    ++plots.count;
  }
  return plots;
}

Plots time_series_html(const ReportRequest& request, const std::vector<CovariateSeries>& all) {
  Plots plots;
  int largest_width = 0, largest_height = 0;
  std::vector<bool> on_some_grid(request.pixels.size(), false);
  for (const CovariateSeries& s : all) {
    if (s.kind != SeriesKind::dated || !s.has_sd_and_flag || s.period) continue;
    // Fill outputs on their own grid: a copy on a study grid (kalends grid) has other columns
    // and rows, so the same pixel numbers would be another place.
    if (!metadata_item(s.files.front().path, "KALENDS_GRID_CRS").empty()) continue;
    if (s.grid.width * std::int64_t(s.grid.height) > largest_width * std::int64_t(largest_height))
      largest_width = s.grid.width, largest_height = s.grid.height;
    const std::string folder = canonical_text(fs::path(s.files.front().path).parent_path());
    const CovariateSeries* synoptic = nullptr;
    for (const CovariateSeries& other : all)
      if (other.kind == SeriesKind::synoptic_period && other.name.size() >= 13 &&
          other.name.compare(other.name.size() - 13, 13, "synoptic_mean") == 0 &&
          // a study-grid copy keeps its source's KALENDS_INPUT but not its pixels
          metadata_item(other.files.front().path, "KALENDS_GRID_CRS").empty()) {
        const std::string input = metadata_item(other.files.front().path, "KALENDS_INPUT");
        // the seasons input is the fill folder itself or a pattern inside it
        std::error_code ec;
        const fs::path read = fs::is_directory(input, ec) ? fs::path(input) : fs::path(input).parent_path();
        if (canonical_text(read) == folder) synoptic = &other;
      }
    for (std::size_t i = 0; i < request.pixels.size(); ++i) {
      const auto [c, r] = request.pixels[i];
      on_some_grid[i] = on_some_grid[i] || (c >= 0 && r >= 0 && c < s.grid.width && r < s.grid.height);
    }
    const auto pixels = sample_pixels(request, s.grid);
    if (pixels.empty()) continue;  // the user's pixels lie beyond this layer (another tile)
    std::vector<std::vector<PlotDate>> series(pixels.size());
    std::vector<std::vector<double>> cycle(pixels.size());
    if (synoptic) {
      GDALDatasetUniquePtr ds = open_raster(synoptic->files.front().path);
      for (std::size_t p = 0; p < pixels.size(); ++p)
        for (int b = 1; b <= synoptic->period_count; ++b)
          cycle[p].push_back(read_pixel(*ds, b, pixels[p].first, pixels[p].second));
    }
    int raw_missing = 0;
    // Each raw source opened once (a GRIB of 744 hours is the source of 744 fill outputs), as
    // the commands open it: quietly, where the GRIB driver would print its inventory warnings.
    std::map<std::string, GDALDatasetUniquePtr> raw_sources;
    for (const SeriesFile& f : s.files) {
      GDALDatasetUniquePtr ds = open_raster(f.path);
      const char* source_item = ds->GetMetadataItem("KALENDS_SOURCE");
      std::string source = source_item ? source_item : "";
      int source_band = 1;
      static const std::regex band_suffix(R"((.*) band (\d+))");
      std::smatch m;
      if (std::regex_match(source, m, band_suffix)) source = m[1], source_band = std::stoi(m[2]);
      GDALDataset* raw = nullptr;
      if (!source.empty()) {
        auto [it, added] = raw_sources.try_emplace(source);
        if (added) {
          try {
            it->second = open_raster(source);
          } catch (const InputError&) {
            // gone or unreadable: the plot shows the fill without the observations
          }
        }
        raw = it->second.get();
      }
      if (!raw) ++raw_missing;
      for (std::size_t p = 0; p < pixels.size(); ++p) {
        const auto [c, r] = pixels[p];
        PlotDate d;
        d.day = f.time.days();
        d.value = read_pixel(*ds, 1, c, r);
        d.sd = read_pixel(*ds, 2, c, r);
        const double flag = read_pixel(*ds, 3, c, r);
        d.flag = std::isnan(flag) ? 3 : int(flag);
        d.raw = NAN;
        if (raw && (d.flag == 0 || d.flag == 1))
          if (const auto at = source_pixel(*ds, *raw, c, r)) d.raw = read_pixel(*raw, source_band, at->first, at->second);
        d.synoptic = NAN;
        if (synoptic) {
          const int k = period_index(*synoptic->period, f.time.date());
          if (k < int(cycle[p].size())) d.synoptic = cycle[p][k];
        }
        series[p].push_back(d);
      }
    }
    plots.html += fmt::format("<h3>{}</h3>\n<p class=\"note\">{} dates{}{}.</p>\n", escape(s.name), s.files.size(),
                              synoptic ? "; synoptic cycle from " + escape(synoptic->name) : "; no seasons step read this fill, so no synoptic cycle",
                              raw_missing ? fmt::format("; the raw input of {} dates was not found, so their observations are not shown", raw_missing) : "");
    for (std::size_t p = 0; p < pixels.size(); ++p) {
      int kept = 0, rejected = 0, filled = 0, unfilled = 0;
      for (const PlotDate& d : series[p])
        kept += d.flag == 0, rejected += d.flag == 1, filled += d.flag == 2, unfilled += d.flag == 3;
      std::string counts = fmt::format("{} observations kept, {} rejected, {} filled", kept, rejected, filled);
      if (unfilled > 0) counts += fmt::format(", {} without a value", unfilled);
      // A pixel never observed is filled from its neighbours alone, or not at all: say so.
      if (kept + rejected == 0)
        counts += filled > 0 ? " (never observed: every value comes from neighbouring pixels)"
                             : " (never observed, and nothing filled it)";
      plots.html += fmt::format(
          "<figure class=\"series\"><figcaption>pixel column {}, row {}: {}</figcaption>\n{}</figure>\n",
          pixels[p].first, pixels[p].second, counts,
          time_series_svg(series[p], s.unit,
                          escape(fmt::format("time series of {} at pixel column {}, row {}: {}", s.name, pixels[p].first,
                                             pixels[p].second, counts))));
      ++plots.count;
    }
  }
  if (plots.count == 0 && !request.pixels.empty() && largest_width > 0)
    throw UsageError(fmt::format("--pixels {},{}", request.pixels.front().first, request.pixels.front().second),
                     fmt::format("outside every fill output (the largest grid is {} x {})", largest_width, largest_height));
  // Some of the user's pixels drawn, others beyond every grid: say which were left out.
  std::string beyond;
  for (std::size_t i = 0; i < request.pixels.size(); ++i)
    if (!on_some_grid[i]) beyond += fmt::format("{}{},{}", beyond.empty() ? "" : "; ", request.pixels[i].first, request.pixels[i].second);
  if (!beyond.empty()) {
    plots.notes.push_back(fmt::format("--pixels {}: outside every fill output (the largest grid is {} x {}); not drawn",
                                      beyond, largest_width, largest_height));
    plots.html += "<p class=\"note\">" + escape(plots.notes.back()) + ".</p>\n";
  }
  if (plots.count == 0) plots.html = "<p>No fill outputs (value, sd and flag bands with their source) in this folder.</p>\n";
  return plots;
}

const char* style = R"css(
body{font-family:sans-serif;margin:24px auto;max-width:1120px;color:#222;line-height:1.35}
h1{font-size:1.5em}h2{border-bottom:2px solid #0072b2;padding-bottom:3px;margin-top:32px}
h3{font-size:1.05em;margin:18px 0 6px}
.maps{display:flex;flex-wrap:wrap;gap:18px}
figure{margin:0}figure.map-card{width:340px}
img.map{background:#d9d9d9;border:1px solid #999;image-rendering:pixelated;max-width:100%;height:auto}
figcaption{font-size:.85em;margin:3px 0;overflow-wrap:anywhere}
.caution{border-left:4px solid #d55e00;background:#fff3e8;padding:6px 9px;font-size:.85em}
.flag-legend span{display:inline-block;margin-right:10px;font-size:.8em}
.flag-legend i{display:inline-block;width:11px;height:11px;margin-right:4px;vertical-align:middle;border:1px solid #666}
table{border-collapse:collapse;font-size:.85em;margin:6px 0 14px}td,th{border:1px solid #ccc;padding:2px 7px;text-align:right}
th{background:#eef3f8}td:first-child,th:first-child{text-align:left}
.note{font-size:.85em;color:#555}svg.plot{border:1px solid #ddd;max-width:100%;height:auto}
)css";

}  // namespace

// How every page begins (and how an earlier page is recognised).
constexpr const char* page_start =
    "<!DOCTYPE html>\n<html lang=\"en\">\n<head><meta charset=\"utf-8\"><title>kalends report: ";

ReportSummary run_report(const ReportRequest& request) {
  const fs::path root(request.folder);
  std::error_code ec;
  if (!fs::is_directory(root, ec)) throw InputError(request.folder, "not a folder");
  if (request.samples < 1 || request.samples > 64) throw UsageError("--samples", "between 1 and 64 pixels");
  // A page replaces only an earlier page: a mistyped --html naming a layer or a table would
  // otherwise be lost.
  if (fs::is_regular_file(request.html, ec) && !read_file(request.html).starts_with(page_start))
    throw UsageError("--html '" + request.html + "'",
                     "the file exists and is not a kalends report; give a new name or remove it first");
  // Held until the page is written: no command may replace what is read meanwhile.
  detail::FolderReadLocks reading;
  reading.hold(request.folder);
  std::vector<std::string> searched{request.folder}, prefixes;
  if (!request.steps.empty()) {
    searched.clear();
    for (const std::string& step : request.steps)
      if (fs::is_directory(root / step, ec)) searched.push_back((root / step).string()), prefixes.push_back(step);
    if (searched.empty()) throw InputError(request.folder, "none of the steps shown has a folder here");
  }
  // A folder of validation reports alone (validate's OUT without --keep-work) still makes a page
  // of its scores and plots; a folder with neither layers nor reports is refused.
  std::vector<CovariateSeries> all;
  try {
    // The synoptic cycle's descriptors and suitable-month counts are maps people read; the
    // years' own are as many again and left to `extract --descriptors`.
    all = find_covariates(searched, Descriptors::synoptic, prefixes);
  } catch (const InputError&) {
    bool has_report = false;
    for (auto it = fs::recursive_directory_iterator(root, ec); it != fs::recursive_directory_iterator() && !has_report;
         detail::walk_on(it))
      has_report = it->path().filename() == "report.json" && fs::exists(it->path().parent_path() / "report.md") &&
                   read_file(it->path()).find("\"scores\"") != std::string::npos;
    if (!has_report) throw;
  }
  ReportSummary summary;
  const std::string title = request.title.empty() ? canonical_text(root) : request.title;

  // Maps
  std::string maps;
  std::vector<std::string> without_value;  // layers with no value anywhere: named, not drawn
  for (const CovariateSeries& s : all) {
    const SeriesFile& file = s.files.back();
    std::vector<int> bands;
    std::string shown;
    switch (s.kind) {
      case SeriesKind::dated: bands = {file.band}; shown = "map of " + file.time.label() + " (the last date)"; break;
      case SeriesKind::year_period:
        for (int b = 1; b <= s.period_count; ++b) bands.push_back(b);
        // Per cell, over its periods with a value: "the mean of the 12 periods" had been read
        // as a year's mean where only the summer months have data.
        shown = fmt::format("each cell's mean over those of the {} periods of {} (the last year) with a value",
                            s.period_count, file.year);
        break;
      case SeriesKind::synoptic_period:
        for (int b = 1; b <= s.period_count; ++b) bands.push_back(b);
        shown = fmt::format("each cell's mean over those of the {} periods with a value", s.period_count);
        break;
      case SeriesKind::fixed: bands = {s.band}; shown = "band " + std::to_string(s.band); break;
    }
    // A class raster (compare's year-specific classes) by class, with its meanings; it had been
    // drawn on a continuous ramp as if 1.5 meant something.
    const std::vector<std::string> classes =
        s.kind == SeriesKind::fixed ? class_meanings(file.path, s.band) : std::vector<std::string>{};
    const Quicklook q = classes.empty() ? continuous_quicklook(file.path, bands, request.map_size)
                                        : class_quicklook(file.path, s.band, int(classes.size()), request.map_size);
    // A layer with no value anywhere (the cycle descriptors of a summers-only stack) had been
    // drawn as a blank image with a 0 to 0 legend, as if it had been read.
    if (q.cells_with_value == 0) {
      without_value.push_back(s.name + (s.kind == SeriesKind::dated ? " (its last date, " + file.time.label() + ")" : ""));
      continue;
    }
    // Where and when the layer is: what a reader needs before reading values off it.
    std::string where = fmt::format("{} x {} px", s.grid.width, s.grid.height);
    if (s.grid.has_geotransform) {
      const std::string crs = crs_name_of(s.grid.crs_wkt);
      where += fmt::format(", cells {}, {}", cell_size_text(s.grid.geotransform, s.grid.crs_wkt),
                           crs.empty() ? "no CRS" : crs);
    } else {
      where += ", no georeferencing";
    }
    if (s.kind == SeriesKind::dated)
      where += fmt::format("; {} to {}", s.files.front().time.label(), s.files.back().time.label());
    if (s.kind == SeriesKind::year_period)
      where += fmt::format("; years {} to {}", s.files.front().year, s.files.back().year);
    maps += fmt::format("<figure class=\"map-card\">{}<figcaption><b>{}</b>: {}<br>{}; {}; {}<br><span class=\"note\">{}</span></figcaption>{}",
                        image(q, s.name), escape(s.name), escape(s.description), escape(shown),
                        // A stack's dates may be bands of one file.
                        fmt::format("{} {}{}", s.files.size(), s.kind == SeriesKind::dated ? "date" : "file",
                                    s.files.size() == 1 ? "" : "s"),
                        classes.empty() ? "ramp from the 2nd to the 98th percentile" : "a colour per class",
                        escape(where), classes.empty() ? legend_svg(q, s.unit, summary.maps) : class_legend(classes));
    if (!s.caution.empty()) {
      // What a suitability layer rests on: its model and what counts as a suitable period (the
      // maps had given neither; with the default threshold 0 a period of index 0.001 counts).
      const std::map<std::string, std::string> items = raster_metadata(file.path);  // both from one open
      auto item = [&](const char* key) {
        const auto it = items.find(key);
        return it == items.end() ? std::string() : it->second;
      };
      const std::string model = item("KALENDS_MODEL"), threshold = item("KALENDS_THRESHOLD");
      if (!model.empty())
        maps += "<p class=\"note\">" + escape("Model: " + model +
                                              (threshold.empty() ? "" : "; a period counts as suitable where its index is above " + threshold) +
                                              ".") + "</p>";
      maps += "<p class=\"caution\">" + escape(s.caution) + "</p>";
    }
    maps += "</figure>\n";
    ++summary.maps;
    if (s.has_sd_and_flag) {
      const Quicklook f = flag_quicklook(file.path, 3, request.map_size);
      maps += fmt::format("<figure class=\"map-card\">{}<figcaption><b>{} flag</b>: {}</figcaption>{}</figure>\n",
                          image(f, s.name + " flag"), escape(s.name), escape("flags of " + file.time.label()),
                          flag_legend(s.period.has_value()));
      ++summary.maps;
    }
  }

  // Validation reports and fill statistics
  std::string validation, statistics;
  std::vector<fs::path> found;
  for (auto it = fs::recursive_directory_iterator(root, ec); it != fs::recursive_directory_iterator(); detail::walk_on(it)) {
    const std::string name = it->path().filename().string();
    // The non-throwing tests: a link in a loop (ELOOP) is passed over, not the end of the page.
    std::error_code entry_ec;
    if (!name.empty() && name.front() == '.') {
      if (it->is_directory(entry_ec)) it.disable_recursion_pending();
      continue;
    }
    if (it->is_regular_file(entry_ec)) found.push_back(it->path());
  }
  if (!request.steps.empty())
    std::erase_if(found, [&](const fs::path& p) {
      const std::string first = fs::relative(p, root).begin()->string();
      return std::find(request.steps.begin(), request.steps.end(), first) == request.steps.end();
    });
  std::sort(found.begin(), found.end());
  for (const fs::path& p : found) {
    if (p.filename() == "report.md" && fs::exists(p.parent_path() / "report.json") &&
        read_file(p.parent_path() / "report.json").find("\"scores\"") != std::string::npos) {
      validation += fmt::format("<h3>{}</h3>\n", escape(fs::relative(p, root).string())) + markdown_to_html(read_file(p));
      ++summary.validation_reports;
      if (fs::exists(p.parent_path() / "series.csv")) {
        const Plots series = validation_series_html(p.parent_path() / "series.csv", root);
        validation += "<h4>The withheld values at a few pixels</h4>\n" + series.html;
        summary.validation_plots += series.count;
      } else if (const std::string json = read_file(p.parent_path() / "report.json");
                 nlohmann::json::accept(json) && !nlohmann::json::parse(json).value("series_pixels", nlohmann::json::array()).empty()) {
        // report.md names the pixels of its series.csv: without it the page would promise plots
        // it does not show.
        validation += fmt::format("<p class=\"note\">{}: not found, so the pixels named above are not drawn.</p>\n",
                                  escape(fs::relative(p.parent_path() / "series.csv", root).string()));
      }
    }
    if (p.filename() == "fill-summary.json") {
      statistics += fill_statistics_html(p, root);
      ++summary.fill_summaries;
    }
  }
  if (validation.empty())
    validation = "<p>No validation report in this folder (run <code>kalends validate STACK --out DIR</code> with DIR "
                 "inside it).</p>\n";
  if (statistics.empty()) statistics = "<p>No fill summary in this folder.</p>\n";

  const Plots plots = time_series_html(request, all);
  summary.plots = plots.count;
  summary.notes = plots.notes;

  // How current the page is: the newest of the files it shows, by modification time (a rerun
  // leaves unchanged files untouched, so the same outputs still give the same page). A page
  // left from an earlier night, when a job's step failed and the report waited, shows its age.
  std::optional<fs::file_time_type> newest;
  for (const CovariateSeries& s : all)
    for (const SeriesFile& f : s.files)
      if (const auto time = fs::last_write_time(f.path, ec); !ec && (!newest || time > *newest)) newest = time;
  // And the validation reports and fill summaries shown (a page of validation alone had no date).
  for (const fs::path& p : found)
    if (p.filename() == "report.md" || p.filename() == "fill-summary.json")
      if (const auto time = fs::last_write_time(p, ec); !ec && (!newest || time > *newest)) newest = time;
  std::string as_of;
  if (newest) {
    const auto seconds = std::chrono::duration_cast<std::chrono::seconds>(
        std::chrono::file_clock::to_sys(*newest).time_since_epoch()).count();
    const std::string iso = TimePoint{seconds}.iso();  // YYYY-MM-DDTHH:MM:SSZ
    as_of = fmt::format(" Outputs as of {} {} UTC (the newest file shown).", iso.substr(0, 10), iso.substr(11, 5));
  }
  std::string html = std::string(page_start) + fmt::format(
      "{0}</title>\n"
      "<style>{1}</style></head>\n<body>\n<header><h1>{5}</h1><p class=\"note\">{0}<br>kalends {2}; "
      "{3} layers.{4}</p></header>\n",
      escape(title), style, KALENDS_VERSION, all.size(), as_of,
      // --title names the page; without it the folder is the note and the heading stays generic.
      request.title.empty() ? std::string("kalends report") : escape(request.title));
  if (maps.empty() && without_value.empty()) maps = "<p>No raster layer in this folder.</p>\n";
  std::string empty_note;
  if (!without_value.empty()) {
    std::string names;
    for (const std::string& name : without_value) names += (names.empty() ? "" : ", ") + escape(name);
    empty_note = fmt::format("<p class=\"note\">No value anywhere in what the map would show, so not drawn ({} layer{}): {}.</p>\n",
                             without_value.size(), without_value.size() == 1 ? "" : "s", names);
    summary.notes.push_back(fmt::format("{} layer{} with no value anywhere not drawn (first: {})", without_value.size(),
                                        without_value.size() == 1 ? "" : "s", without_value.front()));
  }
  html += "<section id=\"maps\"><h2>Layers</h2>\n<div class=\"maps\">\n" + maps + "</div>" + empty_note + "</section>\n";
  html += "<section id=\"validation\"><h2>Validation</h2>\n" + validation + "</section>\n";
  html += "<section id=\"fill-statistics\"><h2>Fill statistics</h2>\n" + statistics + "</section>\n";
  html += "<section id=\"time-series\"><h2>Time series of sample pixels</h2>\n"
          "<p class=\"note\">Observations kept (flag 0) and rejected as outliers (flag 1) are the raw input values; "
          "the curve is the filled value with a band of &#177;1 sd; the dashed line is the synoptic "
          "mean of each date's period. Observations removed by the QA rule are not shown.</p>\n" +
          plots.html + "</section>\n";
  html += "</body>\n</html>\n";
  summary.written = write_text_atomically(request.html, html);
  summary.bytes = html.size();
  return summary;
}

}  // namespace kalends
