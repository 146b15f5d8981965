// Every gap-filling method, one line each.
#include <algorithm>

#include "fill/harmonic.hpp"
#include "fill/spacetime.hpp"
#include "fill/whittaker.hpp"
#include "kalends/error.hpp"

namespace kalends {

namespace {

struct Entry {
  const char* name;
  std::unique_ptr<FillMethod> (*make)(const MethodOptions&);
};

constexpr Entry registry[] = {
    {"whittaker", &make_whittaker},
    {"harmonic", &make_harmonic},
    {"spacetime", &make_spacetime},
};

}  // namespace

std::string join_parameters(const MethodParameters& parameters) {
  std::string text;
  for (const auto& [key, value] : parameters) text += (text.empty() ? "" : " ") + key + "=" + value;
  return text;
}

std::unique_ptr<FillMethod> make_fill_method(const MethodOptions& options) {
  // Options every method shares; each method checks its own.
  if (!(options.max_gap_days >= 0)) throw UsageError("--max-gap", "must be 0 (no limit) or a number of days");
  if (!(options.reach_days >= 0)) throw UsageError("--reach", "must be 0 (the whole series at once) or a number of days");
  for (const Entry& entry : registry)
    if (options.method == entry.name) return entry.make(options);
  std::string known;
  for (const Entry& entry : registry) known += std::string(known.empty() ? "" : ", ") + entry.name;
  throw UsageError("--method", "unknown method '" + options.method + "' (known: " + known + ")");
}

std::vector<std::string> fill_method_names() {
  std::vector<std::string> names;
  for (const Entry& entry : registry) names.emplace_back(entry.name);
  return names;
}

}  // namespace kalends
