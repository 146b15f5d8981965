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
  // Options (job keys) only this method reads; given for another method they would do nothing.
  std::initializer_list<const char*> own_options;
};

const Entry registry[] = {
    {"whittaker", &make_whittaker, {"lambda", "lambda_range", "order", "envelope"}},
    {"harmonic", &make_harmonic, {"harmonics", "trend", "reject_below"}},
    {"spacetime", &make_spacetime,
     {"space_smoothing", "time_smoothing", "climate_smoothing", "season_smoothing", "halo", "neighbour_radius",
      "tolerance", "fft_wisdom", "never_observed"}},
};

// Options (job keys) that some methods read and others do not.
struct SharedOption {
  const char* option;
  std::initializer_list<const char*> methods;
};
const SharedOption shared_options[] = {
    {"max_gap", {"whittaker", "harmonic"}},
    {"max_extrapolation", {"whittaker", "harmonic"}},
};

bool given(const std::vector<std::string>& options, const char* option) {
  return std::find(options.begin(), options.end(), option) != options.end();
}

std::string option_name(const char* option) {
  std::string cli = std::string("--") + option;
  std::replace(cli.begin(), cli.end(), '_', '-');
  return cli;
}

std::string joined(const std::vector<std::string>& methods) {
  std::string text;
  for (const std::string& m : methods) text += (text.empty() ? "" : ", ") + m;
  return text;
}

}  // namespace

std::string join_parameters(const MethodParameters& parameters) {
  std::string text;
  for (const auto& [key, value] : parameters) text += (text.empty() ? "" : " ") + key + "=" + value;
  return text;
}

std::unique_ptr<FillMethod> make_fill_method(const MethodOptions& options) {
  // Options every method shares; each method checks its own.
  if (!(options.max_gap_days >= 0)) throw UsageError("--max-gap", "must be 0 (no limit) or a number of days");
  if (!(options.max_extrapolation_days >= 0 || options.max_extrapolation_days == -1))
    throw UsageError("--max-extrapolation", "must be -1 (no limit) or a number of days");
  if (!(options.reach_days >= 0)) throw UsageError("--reach", "must be 0 (the whole series at once) or a number of days");
  for (const Entry& entry : registry)
    if (options.method == entry.name) return entry.make(options);
  std::string known;
  for (const Entry& entry : registry) known += std::string(known.empty() ? "" : ", ") + entry.name;
  throw UsageError("--method", "unknown method '" + options.method + "' (known: " + known + ")");
}

void check_options_apply(const std::vector<std::string>& methods, const std::vector<std::string>& options,
                         const std::string& methods_option) {
  // An unknown name first: 'whitaker' had been reported as --lambda not applying to it.
  std::string known;
  for (const Entry& entry : registry) known += std::string(known.empty() ? "" : ", ") + entry.name;
  for (const std::string& method : methods)
    if (std::none_of(std::begin(registry), std::end(registry), [&](const Entry& e) { return method == e.name; }))
      throw UsageError(methods_option, "unknown method '" + method + "' (known: " + known + ")");
  for (const Entry& entry : registry)
    for (const char* option : entry.own_options) {
      if (!given(options, option) || std::find(methods.begin(), methods.end(), entry.name) != methods.end()) continue;
      throw UsageError(option_name(option), std::string("applies to the ") + entry.name +
                                                " method only; the methods here: " + joined(methods));
    }
  for (const SharedOption& shared : shared_options) {
    if (!given(options, shared.option)) continue;
    std::string readers;
    bool read = false;
    for (const char* m : shared.methods) {
      readers += (readers.empty() ? "" : " and ") + std::string(m);
      read = read || std::find(methods.begin(), methods.end(), m) != methods.end();
    }
    if (!read)
      throw UsageError(option_name(shared.option),
                       "applies to the " + readers + " methods only; the methods here: " + joined(methods));
  }
}

std::vector<std::string> fill_method_names() {
  std::vector<std::string> names;
  for (const Entry& entry : registry) names.emplace_back(entry.name);
  return names;
}

}  // namespace kalends
