// Finding covariate series in folders: the metadata kalends writes (KALENDS_DATE,
// KALENDS_PERIOD, KALENDS_YEAR, band descriptions "month 01" / "doy 001") says how each file is
// matched to a date. Other rasters are read as `kalends fill` reads a stack where they carry
// dates (bands dated by a CF time axis or GRIB valid times, a pattern of dated files), else as
// fixed bands.
#include "kalends/covariates.hpp"

#include <algorithm>
#include <cstdlib>
#include <filesystem>
#include <functional>
#include <map>
#include <optional>
#include <regex>
#include <set>

#include "io/file_glob.hpp"
#include "io/gdal_session.hpp"
#include "kalends/error.hpp"
#include "kalends/suitability.hpp"

namespace kalends {

namespace fs = std::filesystem;

int period_index(const CalendarPeriod& period, const CivilDate& date) {
  if (period.kind == CalendarPeriod::Kind::month) return date.month - 1;
  // Day 366 belongs to the year's last period (periods_of_year).
  return std::min((day_of_year(date) - 1) / period.days, period.per_year() - 1);
}

TimePoint next_period_start(const CalendarPeriod& period, TimePoint start) {
  const CivilDate d = start.date();
  return TimePoint{period.span_of_day(days_from_civil(d.year, d.month, d.day)).second * 86400};
}

namespace {

std::string item(GDALDataset& ds, const char* key) {
  const char* v = ds.GetMetadataItem(key);
  return v ? v : "";
}

bool is_period_label(const std::string& d) {
  static const std::regex label(R"((month \d\d|doy \d\d\d))");
  return std::regex_match(d, label);
}

struct Scanned {
  std::string path, group;  // group: the folder part of the name
  std::string stem;
  bool stack = false;  // a pattern of files or a GDAL connection string, opened as a stack
};

std::string trim_separators(std::string s) {
  while (!s.empty() && (s.back() == '_' || s.back() == '-' || s.back() == '.')) s.pop_back();
  return s;
}

// What a dated file's name says before its date ("ndvi" of ndvi_2021-01-17.tif); nothing where
// the name holds no date.
std::optional<std::string> name_before_date(const Scanned& s) {
  const auto in_name = find_date_in_name(fs::path(s.path).filename().string());
  if (!in_name) return std::nullopt;
  return trim_separators(s.stem.substr(0, in_name->position));
}

void collect(const fs::path& root, const std::string& prefix, std::vector<Scanned>& out) {
  std::error_code ec;
  if (fs::is_regular_file(root, ec)) {
    out.push_back({root.string(), prefix, root.stem().string()});
    return;
  }
  if (!fs::is_directory(root, ec)) {
    const std::string input = root.string();
    if (detail::has_glob_characters(input) || detail::connection_parts(input)) {
      out.push_back({input, prefix, "", true});
      return;
    }
    throw InputError(input, "no such file or folder");
  }
  std::vector<fs::path> files;
  for (auto it = fs::recursive_directory_iterator(root, ec); it != fs::recursive_directory_iterator(); detail::walk_on(it)) {
    const std::string name = it->path().filename().string();
    if (name == half_published_marker) require_not_half_published(it->path().parent_path().string());
    // The non-throwing tests: a link in a loop (ELOOP) is passed over, where it had stopped
    // extract and report ("Too many levels of symbolic links").
    std::error_code entry_ec;
    if (!name.empty() && name.front() == '.') {
      if (it->is_directory(entry_ec)) it.disable_recursion_pending();
      continue;
    }
    // A tiled fill: its mosaic stands for the tile folders beside it.
    if (it->is_directory(entry_ec) && name != "mosaic" && fs::is_directory(it->path().parent_path() / "mosaic", entry_ec)) {
      it.disable_recursion_pending();
      continue;
    }
    const std::string ext = it->path().extension().string();
    if (it->is_regular_file(entry_ec) && (ext == ".tif" || ext == ".tiff" || ext == ".TIF" || ext == ".vrt" || ext == ".nc" ||
                                    ext == ".grib" || ext == ".grb" || ext == ".grib2" || ext == ".grb2"))
      files.push_back(it->path());
  }
  std::sort(files.begin(), files.end());
  for (const fs::path& f : files) {
    std::string group = prefix;
    for (const auto& part : fs::relative(f.parent_path(), root))
      if (part != "." && part != "mosaic") group += (group.empty() ? "" : ".") + part.string();
    out.push_back({f.string(), group, f.stem().string()});
  }
}

// A raster kalends did not write, opened as a stack: every band dated (a CF time axis, GRIB
// valid times, dates as band descriptions or items, or the file name's date). Nothing where its
// bands carry no date, or a date item or name kalends cannot read (it stays a set of fixed
// bands, as before); the stack's error where its CF time axis cannot be read (a calendar other
// than the standard ones, a time before 1582): read as undated bands, such a file had matched
// every survey date to every band.
std::optional<Stack> dated_stack(const std::string& path) {
  try {
    return Stack::open(path);
  } catch (const InputError& e) {
    if (e.reason().starts_with("time axis")) throw;
    return std::nullopt;
  }
}

// Whether `variable` (a subdataset of a container file) lies on a georeferenced grid: CF bounds
// (time_bnds, lat_bnds) and other tables are variables too, but no maps.
bool georeferenced(const std::string& variable) {
  GDALDatasetUniquePtr ds(GDALDataset::Open(variable.c_str(), GDAL_OF_RASTER | GDAL_OF_READONLY));
  double gt[6];
  return ds && ds->GetGeoTransform(gt) == CE_None;
}

}  // namespace

std::vector<CovariateSeries> find_covariates(const std::vector<std::string>& paths, Descriptors descriptors,
                                             const std::vector<std::string>& prefixes) {
  std::vector<Scanned> scanned;
  for (std::size_t i = 0; i < paths.size(); ++i)
    collect(fs::path(paths[i]), i < prefixes.size() ? prefixes[i] : "", scanned);
  std::map<std::string, CovariateSeries> by_name;
  std::vector<std::string> order;
  auto series_for = [&](const std::string& name) -> CovariateSeries& {
    auto [it, added] = by_name.try_emplace(name);
    if (added) {
      it->second.name = name;
      order.push_back(name);
    }
    return it->second;
  };
  // A stack as `kalends fill` reads it: a dated series, an entry per date (a file or a band).
  std::set<std::string> stack_series;
  auto add_stack = [&](const Stack& stack, const std::string& name) {
    CovariateSeries& c = series_for(name);
    if (!c.files.empty())
      throw InputError(stack.input(), "would be the series '" + name + "', as " + c.files.front().path +
                                          " is: give the files or folders apart, in two runs, or rename one");
    stack_series.insert(name);
    c.kind = SeriesKind::dated;
    for (const Layer& layer : stack.layers()) c.files.push_back({layer.path, layer.time, 0, false, layer.band});
    c.grid = stack.grid();
    c.unit = stack.layers().front().unit;
    c.description = stack.input();
  };
  // How many files of a folder share `s`'s folder and name before a date (ndvi_ of
  // ndvi_2021-01-17.tif): two or more make a dated series.
  std::map<std::string, int> dated_names;
  auto dated_key = [](const Scanned& s) -> std::optional<std::string> {
    const auto name = s.stack ? std::nullopt : name_before_date(s);
    if (!name) return std::nullopt;
    return s.group + "|" + *name;
  };
  for (const Scanned& s : scanned)
    if (const auto key = dated_key(s)) ++dated_names[*key];
  auto files_dated_as = [&](const Scanned& s) {
    const auto key = dated_key(s);
    return key ? dated_names[*key] : 0;
  };
  // One raster file (or variable) named `stem`, its series named after `prefix` + stem.
  std::function<void(const Scanned&)> scan = [&](const Scanned& s) {
    const std::string prefix = s.group.empty() ? "" : s.group + ".";
    if (s.stack && detail::has_glob_characters(s.path)) {  // a pattern is a stack whatever it holds
      const Stack stack = Stack::open(s.path);
      add_stack(stack, prefix + stack.name());
      return;
    }
    GDALDatasetUniquePtr ds;
    try {
      ds = detail::open_raster(s.path);
    } catch (const InputError&) {
      // A file of several variables (NetCDF, HDF5): each as if given by its name, but for those
      // on no georeferenced grid (CF bounds) where some are.
      std::vector<std::string> variables = detail::subdatasets_of(s.path);
      if (variables.empty()) throw;
      std::vector<std::string> maps;
      for (const std::string& variable : variables)
        if (georeferenced(variable)) maps.push_back(variable);
      if (!maps.empty()) variables = maps;
      for (const std::string& variable : variables)
        scan({variable, prefix + s.stem, detail::connection_parts(variable) ? detail::connection_parts(variable)->variable() : "", true});
      return;
    }
    // A variable given by its connection string (NETCDF:"f.nc":tas) is named after the variable.
    const std::string stem = s.stack && detail::connection_parts(s.path) ? detail::connection_parts(s.path)->variable()
                                                                         : s.stem;
    const std::string date_text = item(*ds, "KALENDS_DATE");
    const std::string period_text = item(*ds, "KALENDS_PERIOD");
    const std::string year_text = item(*ds, "KALENDS_YEAR");
    // The metadata a kalends command wrote; another tool's edits make the file unusable here.
    const auto period_of_file = [&] {
      try {
        return CalendarPeriod::parse(period_text);
      } catch (const UsageError&) {
        throw InputError(s.path, "KALENDS_PERIOD '" + period_text + "' is not a period (1M or Nd)");
      }
    };
    const int bands = ds->GetRasterCount();
    std::vector<std::string> descriptions;
    for (int b = 1; b <= bands; ++b) descriptions.push_back(ds->GetRasterBand(b)->GetDescription());
    auto fill_common = [&](CovariateSeries& c) {
      c.grid = detail::raster_grid(*ds);
      c.unit = ds->GetRasterBand(c.band)->GetUnitType();
      c.caution = item(*ds, "KALENDS_CAUTION");
      // A suitability layer another tool saved again without its caution keeps it here: the
      // caution goes with the model, not with one metadata item.
      if (c.caution.empty() && !item(*ds, "KALENDS_MODEL").empty()) c.caution = suitability_caution;
      c.description = item(*ds, "KALENDS_LAYER");
      if (c.description.empty()) c.description = descriptions[c.band - 1];
    };
    // A raster kalends did not write: a time series where its bands carry dates.
    const bool raw = date_text.empty() && period_text.empty() && year_text.empty() && item(*ds, "KALENDS_VERSION").empty();
    const std::optional<Stack> raw_stack = raw ? dated_stack(s.path) : std::nullopt;
    // A fill output, or one carried to a study grid by `kalends grid` (which adds filled_share).
    const bool fill_bands = bands >= 3 && descriptions[0] == "value" && descriptions[1] == "sd" &&
                            descriptions[2] == "flag";
    const bool periodic = !period_text.empty() && std::all_of(descriptions.begin(), descriptions.end(), is_period_label);
    if (!date_text.empty()) {
      const auto time = parse_iso_time(date_text);
      if (!time) throw InputError(s.path, "KALENDS_DATE '" + date_text + "' is not a date");
      const std::string stem = name_before_date(s).value_or(s.stem);
      CovariateSeries& c = series_for(prefix + (stem.empty() ? "layer" : stem));
      // Beside a raw stack of that name (evi.nc beside fill outputs evi_*.tif): both would be one
      // series, whose dates would clash or interleave.
      if (stack_series.count(c.name))
        throw InputError(s.path, "would be the series '" + c.name + "', as " + c.files.front().path +
                                     " is: give the files or folders apart, in two runs, or rename one");
      c.kind = SeriesKind::dated;
      c.has_sd_and_flag = fill_bands;
      if (!period_text.empty()) c.period = period_of_file();
      const std::string step = item(*ds, "KALENDS_TIME_STEP_DAYS");
      if (!step.empty()) {
        char* end = nullptr;
        c.step_days = std::strtod(step.c_str(), &end);
        if (end == step.c_str() || *end != '\0' || !(c.step_days > 0))
          throw InputError(s.path, "KALENDS_TIME_STEP_DAYS '" + step + "' is not a number of days");
      }
      const std::string covered = item(*ds, "KALENDS_PERIOD_DAYS_COVERED");
      c.files.push_back({s.path, *time, 0, covered == "0"});
      if (!covered.empty() && std::all_of(covered.begin(), covered.end(), [](char ch) { return ch >= '0' && ch <= '9'; }))
        c.files.back().days_covered = std::stoi(covered);
      if (c.files.size() == 1) fill_common(c);
      else require_same_grid(c.grid, detail::raster_grid(*ds), s.path);
    } else if (periodic) {
      const CalendarPeriod period = period_of_file();
      std::string stem = s.stem;
      const std::string year_suffix = "_" + year_text;
      if (!year_text.empty() && stem.size() > year_suffix.size() &&
          stem.compare(stem.size() - year_suffix.size(), year_suffix.size(), year_suffix) == 0)
        stem.resize(stem.size() - year_suffix.size());
      CovariateSeries& c = series_for(prefix + stem);
      c.kind = year_text.empty() ? SeriesKind::synoptic_period : SeriesKind::year_period;
      c.period = period;
      c.period_count = bands;
      c.files.push_back({s.path, {}, year_text.empty() ? 0 : std::stoi(year_text)});
      if (c.kind == SeriesKind::synoptic_period && c.files.size() > 1)
        throw InputError(s.path, "a second synoptic file for the series '" + c.name + "'");
      if (c.files.size() == 1) fill_common(c);
      else require_same_grid(c.grid, detail::raster_grid(*ds), s.path);
    } else if (raw_stack && raw_stack->layers().size() == 1 && bands == 1 && !s.stack &&
               files_dated_as(s) >= 2) {
      // A folder of dated files kalends did not write (ndvi_2021-01-17.tif, ...): one dated
      // series, as the pattern 'ndvi_*.tif' gives; each had been a fixed layer, read for every
      // survey date, with a note per file.
      const std::string stem = name_before_date(s).value_or(s.stem);
      CovariateSeries& c = series_for(prefix + (stem.empty() ? "layer" : stem));
      if (stack_series.count(c.name) || (!c.files.empty() && c.kind != SeriesKind::dated))
        throw InputError(s.path, "would be the series '" + c.name + "', as " + c.files.front().path +
                                     " is: give the files or folders apart, in two runs, or rename one");
      const Layer& layer = raw_stack->layers().front();
      c.kind = SeriesKind::dated;
      c.files.push_back({layer.path, layer.time, 0, false, layer.band});
      if (c.files.size() == 1) {
        c.grid = raw_stack->grid();
        c.unit = layer.unit;
        c.description = fs::path(s.path).parent_path().string();
      } else {
        require_same_grid(c.grid, raw_stack->grid(), s.path);
      }
    } else if (raw_stack && raw_stack->layers().size() > 1) {
      // A NetCDF file of one variable is named as a file of several is: file.variable.
      const char* variable = ds->GetRasterBand(1)->GetMetadataItem("NETCDF_VARNAME");
      add_stack(*raw_stack, prefix + (variable && !s.stack ? stem + "." + variable : stem));
    } else if ((period_text.empty() && year_text.empty()) || descriptors == Descriptors::all ||
               (descriptors == Descriptors::synoptic && year_text.empty())) {
      for (int b = 1; b <= bands; ++b) {
        std::string name = prefix + stem;
        // Plain rasters: bands by number; kalends descriptors by their description.
        const bool by_description = !(period_text.empty() && year_text.empty()) && !descriptions[b - 1].empty();
        if (bands > 1) name += "." + (by_description ? descriptions[b - 1] : "b" + std::to_string(b));
        CovariateSeries& c = series_for(name);
        // The same name from two inputs (layer.tif in two folders given): one would be lost.
        if (!c.files.empty())
          throw InputError(s.path, "would be the series '" + name + "', as " + c.files.front().path +
                                       " is: give the folders' parent folder, or rename one of the files");
        c.kind = SeriesKind::fixed;
        c.band = b;
        c.files = {{s.path, {}, 0}};
        fill_common(c);
        // One date is no series (its value would stand for a day alone): read for every survey
        // date, and said.
        if (raw_stack && bands == 1)
          c.note = "its one band, dated " + raw_stack->layers().front().time.label() +
                   ", is read as a fixed layer for every survey date";
      }
    }
  };
  for (const Scanned& s : scanned) scan(s);
  std::vector<CovariateSeries> result;
  for (const std::string& name : order) {
    CovariateSeries c = std::move(by_name[name]);
    std::sort(c.files.begin(), c.files.end(), [](const SeriesFile& a, const SeriesFile& b) {
      return a.time < b.time || (a.time == b.time && a.year < b.year);
    });
    for (std::size_t i = 1; i < c.files.size(); ++i)
      if (c.kind == SeriesKind::dated ? c.files[i].time == c.files[i - 1].time : c.files[i].year == c.files[i - 1].year)
        throw InputError(c.files[i].path, "the same date or year as " + c.files[i - 1].path);
    set_date_marks(c, DateMarks::start);
    result.push_back(std::move(c));
  }
  if (result.empty()) {
    std::string all;
    for (const auto& p : paths) all += (all.empty() ? "" : ", ") + p;
    throw InputError(all, "no raster layers found");
  }
  return result;
}

}  // namespace kalends
