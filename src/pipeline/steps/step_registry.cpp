#include <fmt/format.h>

#include <algorithm>
#include <cmath>
#include <filesystem>

#include "kalends/error.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

const std::vector<OptionKey>& option_keys() {
  static const std::vector<OptionKey> keys{
      {"--day-time", "day_hour"}, {"--night-time", "night_hour"}, {"--scale", "scale"}, {"--offset", "offset"},
      {"--nodata", "nodata"},     {"--valid-range", "valid_range"},
      {"--red-band", "red_band"}, {"--nir-band", "nir_band"}, {"--blue-band", "blue_band"},
      {"--table", "table"},       {"--html", "html"},
      // The inputs a step names by key (after the options they begin: --day-time, --red-band).
      {"--temperature", "temperature"}, {"--tmin", "tmin"}, {"--tmax", "tmax"}, {"--day", "day"},
      {"--night", "night"}, {"--red", "red"}, {"--nir", "nir"}, {"--blue", "blue"}};
  return keys;
}

const std::vector<StepKind>& step_kinds() {
  static const std::vector<StepKind> kinds{
      index_step_kind(),
      fill_step_kind(),
      seasons_step_kind(),
      compare_step_kind(),
      suitability_step_kind(),
      grid_step_kind(),
      extract_step_kind(),
      report_step_kind(),
  };
  return kinds;
}

const StepKind* find_step_kind(const std::string& name) {
  for (const StepKind& kind : step_kinds())
    if (kind.name == name) return &kind;
  return nullptr;
}

std::string step_kind_names() {
  std::string names;
  for (const StepKind& kind : step_kinds()) names += (names.empty() ? "" : ", ") + kind.name;
  return names;
}

namespace {

// "--date-marks" for the key date_marks: the job reader turns it back into the key.
std::string option_of(const char* key) {
  std::string option = std::string("--") + key;
  std::replace(option.begin(), option.end(), '_', '-');
  return option;
}

}  // namespace

std::string StepContext::text(const char* key, const std::string& fallback) const {
  const auto it = options.find(key);
  return it == options.end() ? fallback : it->second;
}

double StepContext::number(const char* key, double fallback) const {
  if (!has(key)) return fallback;
  try {
    return std::stod(options.at(key));
  } catch (const std::exception&) {  // it had said only "stod"
    throw UsageError(option_of(key) + " '" + options.at(key) + "'", "expected a number");
  }
}

std::optional<double> StepContext::number_or_auto(const char* key,
                                                  std::optional<double> fallback) const {
  if (!has(key)) return fallback;
  if (text(key) == "auto") return std::nullopt;
  return number(key, 0);
}

int StepContext::integer(const char* key, int fallback) const {
  if (!has(key)) return fallback;
  try {
    return std::stoi(options.at(key));
  } catch (const std::exception&) {  // it had said only "stoi"
    throw UsageError(option_of(key) + " '" + options.at(key) + "'", "expected a whole number");
  }
}

bool path_inside(const std::string& path, const std::string& folder) {
  std::error_code ec;
  const std::filesystem::path real_folder = std::filesystem::weakly_canonical(folder, ec);
  const std::filesystem::path real_path = std::filesystem::weakly_canonical(path, ec);
  const std::filesystem::path relative = real_path.lexically_relative(real_folder);
  return !relative.empty() && *relative.begin() != "..";
}

std::vector<std::string> split_list(const std::string& text) {
  std::vector<std::string> items;
  for (std::string rest = text; !rest.empty();) {
    const auto comma = rest.find(',');
    items.push_back(rest.substr(0, comma));
    rest = comma == std::string::npos ? "" : rest.substr(comma + 1);
  }
  return items;
}

std::vector<std::string> StepContext::list(const char* key) const { return split_list(text(key)); }

namespace {

// Each item of a texts key read whole by `read` (std::stod, std::stoi), or UsageError.
template <class Value, class Read>
std::vector<Value> read_items(const StepContext& c, const char* key, Read read, const char* expected) {
  std::vector<Value> values;
  for (const std::string& item : c.list(key)) {
    std::size_t used = 0;
    Value v{};
    try {
      v = read(item, &used);
    } catch (const std::exception&) {
      used = 0;
    }
    if (used == 0 || item.find_first_not_of(' ', used) != std::string::npos || !std::isfinite(double(v)))
      throw UsageError(option_of(key) + " '" + item + "'", expected);
    values.push_back(v);
  }
  return values;
}

}  // namespace

std::vector<double> StepContext::numbers(const char* key) const {
  return read_items<double>(*this, key, [](const std::string& s, std::size_t* used) { return std::stod(s, used); },
                            "expected a number");
}

std::vector<int> StepContext::integers(const char* key) const {
  return read_items<int>(*this, key, [](const std::string& s, std::size_t* used) { return std::stoi(s, used); },
                         "expected a whole number");
}

std::pair<double, double> StepContext::pair(const char* key) const {
  const std::string v = text(key);
  return {std::stod(v.substr(0, v.find(','))), std::stod(v.substr(v.find(',') + 1))};
}

}  // namespace kalends::detail
