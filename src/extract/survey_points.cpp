// Survey points from a CSV table (coordinates in two columns, in a CRS given by the user,
// WGS 84 by default) or from any OGR vector source with point geometries (its own CRS).
#include <ogrsf_frmts.h>

#include <algorithm>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <iterator>
#include <optional>
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

std::string extension_of(const std::string& path) { return lower(std::filesystem::path(path).extension().string()); }

std::string trim(const std::string& s) {
  const auto a = s.find_first_not_of(" \t\r\n");
  if (a == std::string::npos) return "";
  return s.substr(a, s.find_last_not_of(" \t\r\n") - a + 1);
}

int field_index(OGRFeatureDefn& defn, const std::string& column, const std::string& option,
                const std::string& path) {
  // A name as written wins; else one that differs only in case ("Latitude" for the default
  // "latitude"). Two that match equally cannot be told apart.
  std::vector<int> exact, folded;
  for (int k = 0; k < defn.GetFieldCount(); ++k) {
    const std::string name = defn.GetFieldDefn(k)->GetNameRef();
    if (name == column) exact.push_back(k);
    else if (lower(name) == lower(column)) folded.push_back(k);
  }
  if (exact.size() == 1) return exact[0];
  if (exact.size() > 1)
    throw InputError(path, fmt::format("has two columns named '{}' (columns {} and {}); rename one", column,
                                       exact[0] + 1, exact[1] + 1));
  if (folded.size() == 1) return folded[0];
  if (folded.size() > 1)
    throw InputError(path, fmt::format("has columns '{}' and '{}' (columns {} and {}), neither written as '{}' ({}); "
                                       "give the one meant as it is written",
                                       defn.GetFieldDefn(folded[0])->GetNameRef(),
                                       defn.GetFieldDefn(folded[1])->GetNameRef(), folded[0] + 1, folded[1] + 1,
                                       column, option));
  std::string names;
  for (int k = 0; k < defn.GetFieldCount(); ++k) names += (k ? ", " : "") + std::string(defn.GetFieldDefn(k)->GetNameRef());
  throw InputError(path, "no column '" + column + "' (" + option + "); the columns are: " + names);
}

// A field as the table means it: trimmed, and empty where it holds a missing-value marker as
// statistics packages write them (R's NA, pandas' NaN, SQL's NULL). Common practice, no source.
std::string field_text(const std::string& raw) {
  const std::string text = trim(raw);
  for (const char* marker : {"NA", "N/A", "NaN", "nan", "NULL", "null"})
    if (text == marker) return "";
  return text;
}

double coordinate(const std::string& text, const std::string& where) {
  char* end = nullptr;
  const double v = std::strtod(text.c_str(), &end);
  // strtod also reads hexadecimal ("0x10" as 16), which no survey table means.
  if (end == text.c_str() || *end != '\0' || !std::isfinite(v) || text.find_first_of("xXpP") != std::string::npos) {
    // A spreadsheet's export in a locale that writes decimal commas (in a ';' table).
    std::string dotted = text;
    if (std::count(text.begin(), text.end(), ',') == 1) dotted[text.find(',')] = '.';
    char* dotted_end = nullptr;
    if (dotted != text && (std::strtod(dotted.c_str(), &dotted_end), dotted_end != dotted.c_str() && *dotted_end == '\0'))
      throw InputError(where, "'" + text + "' is not a coordinate (a decimal comma? write " + dotted + ")");
    throw InputError(where, "'" + text + "' is not a coordinate");
  }
  return v;
}

// The data rows of a CSV as GDAL's reader returns them (lines that are empty are skipped; a
// quoted field may span lines): each row's line number and field count. GDAL fills a short row
// with nulls and drops a long row's extra fields, so a decimal comma in an unquoted field would
// shift the columns unseen; the counts let such a row be refused. `fields` is the header's
// field count, which picks the separator GDAL chose.
struct CsvRow {
  int line = 0, fields = 0;
  bool blank = false;  // every field empty or spaces (a spreadsheet's leftover separators)
  bool open_quote = false;  // the file ends inside a quote opened in this row
  bool stray_quote = false;  // a quote inside an unquoted field, or text after a closing quote
};

// Reads the record that starts at `pos` (a quoted field may span lines) and moves `pos` past
// it; counts its fields and the line ends inside quotes.
CsvRow read_record(const std::string& text, std::size_t& pos, char separator, int& extra_lines) {
  CsvRow row{0, 1, true};
  bool quoted = false;
  // Where the field stands: nothing but spaces yet, text, or a quoted part just closed. A quote
  // is a field's quote only at its start (RFC 4180, section 2): an inch mark in `well 3" deep`
  // had opened a quote that ran on to the next one, rows later, joining the rows between.
  enum { empty, text_seen, closed } field = empty;
  for (; pos < text.size(); ++pos) {
    const char c = text[pos];
    const bool space = std::isspace(static_cast<unsigned char>(c));
    if (quoted) {
      if (c == '"' && pos + 1 < text.size() && text[pos + 1] == '"') ++pos, row.blank = false;
      else if (c == '"') quoted = false, field = closed;
      else extra_lines += c == '\n', row.blank = row.blank && space;
    } else if (c == '"') {
      if (field != empty) row.stray_quote = true;
      quoted = true;
    } else if (c == separator) {
      ++row.fields;
      field = empty;
    } else if (c == '\n') {
      ++pos;
      break;
    } else if (!space) {
      row.blank = false;
      if (field == closed) row.stray_quote = true;
      field = text_seen;
    }
  }
  row.open_quote = quoted;
  return row;
}

// `text`: the CSV's text without its byte-order mark.
std::vector<CsvRow> csv_rows(const std::string& text, int fields) {
  std::size_t data = 0;
  int lines = 0;
  char separator = ',';
  for (char candidate : {',', ';', '\t', '|', ' '}) {
    std::size_t pos = 0;
    lines = 0;
    if (read_record(text, pos, candidate, lines).fields == fields) {
      separator = candidate;
      data = pos;
      break;
    }
  }
  if (data == 0) {  // no separator gives the header's count: take GDAL's word for the rows
    std::size_t pos = 0;
    read_record(text, pos, separator, lines);
    data = pos;
  }
  std::vector<CsvRow> rows;
  int line = 2 + lines;
  for (std::size_t pos = data; pos < text.size();) {
    const std::size_t start = pos;
    int extra = 0;
    CsvRow row = read_record(text, pos, separator, extra);
    row.line = line;
    line += 1 + extra;
    if (text.find_first_not_of("\r\n", start) >= pos) continue;  // an empty line
    rows.push_back(row);
  }
  return rows;
}

// YYYY-MM-DD or YYYY-MM (also with '/', as OGR prints date fields), optionally a time after.
void read_date(SurveyPoint& p, const std::string& where) {
  // A time of day after the date (and a zone) is allowed and ignored; other text is not a date
  // ("1999-06-30 garbage" had been read as 30 June).
  static const std::regex pattern(
      R"((\d{4})[-/](\d{1,2})(?:[-/](\d{1,2}))?(?:[Tt ](?:[01]?\d|2[0-3]):[0-5]\d(?::(?:[0-5]\d|60)(?:[.,]\d+)?)?\s*(?:[Zz]|UTC|[+-](?:[01]\d|2[0-3])(?::?[0-5]\d)?)?)?)");
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

// Whether the text holds nothing but a byte-order mark and white space (a spreadsheet's export
// of an empty sheet): "is empty" says more than "unknown format".
bool only_blank(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  std::string head(65536, '\0');
  in.read(head.data(), std::streamsize(head.size()));
  head.resize(std::size_t(in.gcount()));
  if (!in.eof()) return false;  // larger than what was read: not blank
  if (head.starts_with("\xEF\xBB\xBF")) head.erase(0, 3);
  return head.find_first_not_of(" \t\r\n") == std::string::npos;
}

// GDAL's CSV reader (3.6) tells comma, semicolon and tab apart but not '|': a pipe-separated
// table is handed to it as a tab-separated copy in memory, the separators outside quotes
// swapped. The copy lives as long as this object.
class PipeTable {
 public:
  explicit PipeTable(const std::string& path) {
    std::ifstream in(path, std::ios::binary);
    std::string text((std::istreambuf_iterator<char>(in)), std::istreambuf_iterator<char>());
    const std::string header = text.substr(0, text.find('\n'));
    if (header.find('|') == std::string::npos || header.find_first_of(",;\t") != std::string::npos) return;
    bool quoted = false;
    for (char& c : text) {
      if (c == '"') quoted = !quoted;
      else if (c == '|' && !quoted) c = '\t';
    }
    name_ = fmt::format("/vsimem/kalends-points-{}.csv", static_cast<const void*>(this));
    VSILFILE* f = VSIFOpenL(name_.c_str(), "wb");
    if (!f) {
      name_.clear();
      return;
    }
    VSIFWriteL(text.data(), 1, text.size(), f);
    VSIFCloseL(f);
  }
  ~PipeTable() {
    if (!name_.empty()) VSIUnlink(name_.c_str());
  }
  PipeTable(const PipeTable&) = delete;
  PipeTable& operator=(const PipeTable&) = delete;
  const std::string& name() const { return name_; }

 private:
  std::string name_;
};

}  // namespace

SurveyPoints read_survey_points(const PointsSource& source) {
  OGRSpatialReference crs;
  // In degrees, a latitude beyond the poles is a typing slip, swapped columns or projected
  // coordinates in a file that states no CRS.
  const auto in_degrees = [&crs](const SurveyPoint& p, const std::string& xs, const std::string& ys,
                                 const std::string& where, const std::string& x_name, const std::string& y_name) {
    if (!crs.IsGeographic()) return;
    if (std::abs(p.y) > 90)
      throw InputError(where, fmt::format("{} {} is beyond ±90 degrees (a slip, {} and {} swapped, or coordinates "
                                          "of another CRS?)", y_name, ys, x_name, y_name));
    if (std::abs(p.x) > 360) throw InputError(where, fmt::format("{} {} is beyond ±360 degrees", x_name, xs));
  };
  detail::start_gdal();
  const std::string path = source.path;
  if (!std::filesystem::exists(path)) throw InputError(path, "no such file");
  std::error_code ec;
  if (std::filesystem::is_regular_file(path, ec) && (std::filesystem::file_size(path, ec) == 0 || only_blank(path)))
    throw InputError(path, "is empty");
  {
    // A spreadsheet's "Unicode text" or an Excel CSV with its "sep=" line: GDAL reads neither
    // ("unknown format", "no column 'id' ... the columns are: sep=").
    std::ifstream in(path, std::ios::binary);
    std::string head(8, '\0');
    in.read(head.data(), std::streamsize(head.size()));
    head.resize(std::size_t(in.gcount()));
    if (head.starts_with("\xFF\xFE") || head.starts_with("\xFE\xFF"))
      throw InputError(path, "is UTF-16 text (a spreadsheet's \"Unicode text\"?); save it as UTF-8 CSV");
    if (head.starts_with("\xEF\xBB\xBF")) head.erase(0, 3);
    if (lower(head).starts_with("sep=") && extension_of(path) != ".gpkg")
      throw InputError(path + ":1", "starts with a spreadsheet's \"sep=\" line; remove that line");
  }
  CPLErrorReset();
  GDALDatasetUniquePtr ds(GDALDataset::Open(path.c_str(), GDAL_OF_VECTOR | GDAL_OF_READONLY));
  const std::string extension = extension_of(path);
  if (!ds && (extension == ".txt" || extension == ".tsv" || extension == ".tab" || extension == ".dat")) {
    // A delimited text file by another name: GDAL's CSV reader takes it when asked by name.
    CPLErrorReset();
    ds.reset(GDALDataset::Open(("CSV:" + path).c_str(), GDAL_OF_VECTOR | GDAL_OF_READONLY));
  }
  std::optional<PipeTable> pipe_table;
  if (!ds && (extension == ".csv" || extension == ".txt" || extension == ".tsv" || extension == ".tab" ||
              extension == ".dat")) {
    pipe_table.emplace(path);
    if (!pipe_table->name().empty())
      ds.reset(GDALDataset::Open(pipe_table->name().c_str(), GDAL_OF_VECTOR | GDAL_OF_READONLY));
  }
  if (!ds || ds->GetLayerCount() < 1)
    throw InputError(path, "cannot open as a table of points (" + detail::gdal_message("unknown format") + ")");
  const bool csv = std::string(ds->GetDriver()->GetDescription()) == "CSV";
  // A CSV's text, read once: for the checks below and its rows' line numbers (csv_rows).
  std::string text;
  if (csv) {
    std::ifstream in(path, std::ios::binary);
    text.assign(std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>());
    if (text.starts_with("\xEF\xBB\xBF")) text.erase(0, 3);
    // GDAL's reader ends a field at a NUL byte and drops what follows it: a point had lost its
    // coordinates and date ("no coordinates", exit 0). No text table holds one unless damaged.
    if (const std::size_t at = text.find('\0'); at != std::string::npos)
      throw InputError(fmt::format("{}:{}", path, 1 + std::count(text.begin(), text.begin() + std::ptrdiff_t(at), '\n')),
                       "holds a NUL byte (a file damaged on disk or on its way?); mend or remove that line");
  }
  OGRLayer* layer = ds->GetLayer(0);
  OGRFeatureDefn& defn = *layer->GetLayerDefn();
  // A table without geometries (a spreadsheet, a .dbf alone, a GeoPackage's attribute table)
  // holds its coordinates in columns, as a CSV does: read as geometries, every point had been
  // "no coordinates", exit 0.
  const bool columns = csv || defn.GetGeomFieldCount() == 0;
  if (layer->GetFeatureCount() == 0) {
    // A quote opened in the header and never closed makes the whole file one header line.
    if (csv) {
      std::size_t pos = 0;
      int lines = 0;
      if (read_record(text, pos, ',', lines).open_quote)
        throw InputError(path + ":1", "a quote (\") opened in the header is never closed");
    }
    throw InputError(path, "holds no points");
  }
  // The id may be a GeoPackage's key column (FID=id), which OGR keeps apart from the fields.
  const std::string key_column = layer->GetFIDColumn() ? layer->GetFIDColumn() : "";
  const bool id_is_key = !key_column.empty() && lower(key_column) == lower(source.id_column) &&
                         defn.GetFieldIndex(source.id_column.c_str()) < 0;
  const int id = id_is_key ? -1 : field_index(defn, source.id_column, "--id-column", path);
  // The default date column may be absent (fixed layers need no date); one the user named may
  // not. OGR finds a field whatever its case.
  const bool no_dates = source.date_column.empty() ||
                        (!source.date_column_given && defn.GetFieldIndex(source.date_column.c_str()) < 0);
  const int date = no_dates ? -1 : field_index(defn, source.date_column, "--date-column", path);
  int x = -1, y = -1;
  SurveyPoints result;
  result.from_columns = columns;
  // A GeoPackage of two survey rounds, a workbook of several sheets: only the first is read.
  if (ds->GetLayerCount() > 1) {
    std::string others;
    for (int k = 1; k < ds->GetLayerCount() && k < 6; ++k) others += fmt::format("{}'{}'", k > 1 ? ", " : "", ds->GetLayer(k)->GetName());
    if (ds->GetLayerCount() > 6) others += ", …";
    result.notes.push_back(fmt::format("{}: holds {} layers; the points were read from the first, '{}', not from {}",
                                       path, ds->GetLayerCount(), layer->GetName(), others));
  }
  result.id_name = id_is_key ? key_column : defn.GetFieldDefn(id)->GetNameRef();
  if (date >= 0) result.date_name = defn.GetFieldDefn(date)->GetNameRef();
  if (columns) {
    x = field_index(defn, source.x_column, "--x-column", path);
    y = field_index(defn, source.y_column, "--y-column", path);
    result.x_name = defn.GetFieldDefn(x)->GetNameRef();
    result.y_name = defn.GetFieldDefn(y)->GetNameRef();
    if (x == y)
      throw UsageError("--x-column '" + source.x_column + "' and --y-column '" + source.y_column + "'",
                       "name the same column of " + path);
  }
  if (!columns && layer->GetSpatialRef()) {
    crs = *layer->GetSpatialRef();
  } else {
    detail::set_crs_from_user(crs, source.crs, "--crs");
    if (!columns)
      result.notes.push_back(path + ": states no CRS (a Shapefile without its .prj?); its coordinates were taken as " +
                             source.crs + " (--crs)");
  }
  char* wkt = nullptr;
  crs.exportToWkt(&wkt);
  result.crs_wkt = wkt ? wkt : "";
  CPLFree(wkt);
  layer->ResetReading();
  const std::vector<CsvRow> rows = csv ? csv_rows(text, defn.GetFieldCount()) : std::vector<CsvRow>{};
  std::size_t row = 0;
  int legacy_ids = 0;
  std::string first_legacy;
  for (auto& feature : *layer) {
    const CsvRow raw = row < rows.size() ? rows[row] : CsvRow{int(row) + 2, defn.GetFieldCount(), false};
    ++row;
    // A vector file's features by their place in the file, counted from 1 as a reader counts
    // (OGR's ids start at 0 in some formats and need not be in order).
    const std::string where = path + (csv       ? ":" + std::to_string(raw.line)
                                      : columns ? " data row " + std::to_string(row)
                                                : " feature " + std::to_string(row));
    if (csv && raw.blank) continue;  // only separators or spaces: nothing was written there
    if (csv && raw.stray_quote)
      throw InputError(where, "has a quote (\") inside a field that does not start with one (an inch or seconds "
                              "mark?); put the field in quotes and double the quote: \"12\"\" pipe\"");
    // A quote never closed swallows the rest of the file: said, not "a row cut short".
    if (csv && raw.open_quote)
      throw InputError(where, "a quote (\") opened in this row is never closed");
    if (csv && raw.fields != defn.GetFieldCount())
      throw InputError(where, fmt::format("has {} fields where the header has {} ({})", raw.fields,
                                          defn.GetFieldCount(),
                                          raw.fields > defn.GetFieldCount()
                                              ? "a decimal comma or a separator inside an unquoted field?"
                                              : "a row cut short?"));
    SurveyPoint p;
    p.id = id_is_key ? std::to_string(feature->GetFID()) : feature->GetFieldAsString(id);
    // A spreadsheet saved in a legacy encoding: its raw bytes had gone into the UTF-8 table
    // without a word. Read as Latin-1 (ISO-8859-1), the likeliest, and said once.
    if (!CPLIsUTF8(p.id.c_str(), -1)) {
      char* recoded = CPLRecode(p.id.c_str(), CPL_ENC_ISO8859_1, CPL_ENC_UTF8);
      p.id = recoded;
      CPLFree(recoded);
      if (legacy_ids++ == 0) first_legacy = where;
    }
    if (columns) {
      const std::string xs = field_text(feature->GetFieldAsString(x)), ys = field_text(feature->GetFieldAsString(y));
      p.x_text = trim(feature->GetFieldAsString(x));  // echoed as written, NA included
      p.y_text = trim(feature->GetFieldAsString(y));
      // Both empty: a point not yet located (its values say so). One alone is a mistake, such
      // as a row cut short.
      if (xs.empty() != ys.empty())
        throw InputError(where, fmt::format("has {} '{}' but no {}", xs.empty() ? source.y_column : source.x_column,
                                            xs.empty() ? ys : xs, xs.empty() ? source.x_column : source.y_column));
      if (xs.empty() || ys.empty()) p.has_coordinates = false;
      else {
        p.x = coordinate(xs, where);
        p.y = coordinate(ys, where);
        in_degrees(p, xs, ys, where, source.x_column, source.y_column);
      }
    } else {
      const OGRGeometry* g = feature->GetGeometryRef();
      // A multipoint of one point is a point as some exports write it (Shapefiles).
      if (g && !g->IsEmpty() && wkbFlatten(g->getGeometryType()) == wkbMultiPoint &&
          g->toMultiPoint()->getNumGeometries() == 1)
        g = g->toMultiPoint()->getGeometryRef(0);
      if (!g || g->IsEmpty()) p.has_coordinates = false;
      else if (wkbFlatten(g->getGeometryType()) != wkbPoint)
        throw InputError(where, std::string("a ") + g->getGeometryName() + ", not a point");
      else {
        p.x = g->toPoint()->getX();
        p.y = g->toPoint()->getY();
        // A Shapefile without its .prj holding projected coordinates, taken as degrees: every
        // point had been "cannot be transformed", exit 0.
        in_degrees(p, fmt::format("{}", p.x), fmt::format("{}", p.y), where, "x", "y");
      }
    }
    if (date >= 0 && feature->IsFieldSetAndNotNull(date)) {
      p.date_text = trim(feature->GetFieldAsString(date));
      if (!field_text(p.date_text).empty()) read_date(p, where);
    }
    result.points.push_back(std::move(p));
  }
  if (result.points.empty()) throw InputError(path, "holds no points");
  if (legacy_ids > 0)
    result.notes.push_back(fmt::format("{}: {} id{} not UTF-8 text (first at {}), read as Latin-1 (ISO-8859-1); save the "
                                       "file as UTF-8 if another encoding was meant",
                                       path, legacy_ids, legacy_ids == 1 ? " is" : "s are", first_legacy));
  return result;
}

}  // namespace kalends
