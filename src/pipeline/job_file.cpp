#include "pipeline/job_file.hpp"

#include <toml++/toml.h>

#include <algorithm>
#include <filesystem>
#include <fmt/format.h>
#include <set>

#include "kalends/error.hpp"

namespace kalends::detail {

namespace {

namespace fs = std::filesystem;

enum class Type { text, number, integer, boolean, text_or_number, pair, texts };

struct Key {
  const char* name;
  Type type;
};

// Every key a step of each kind accepts (docs/job-file.md documents them).
const std::map<std::string, std::vector<Key>>& step_keys() {
  static const std::map<std::string, std::vector<Key>> keys{
      {"fill",
       {{"input", Type::text}, {"method", Type::text}, {"lambda", Type::text_or_number},
        {"lambda_range", Type::pair}, {"order", Type::integer}, {"envelope", Type::text},
        {"robust", Type::boolean}, {"iterations", Type::integer}, {"harmonics", Type::integer},
        {"trend", Type::boolean}, {"reject_below", Type::number}, {"smooth", Type::boolean},
        {"every", Type::text}, {"name", Type::text}, {"max_gap", Type::number},
        {"max_extrapolation", Type::number}, {"reach", Type::number}, {"compress", Type::text},
        {"keep", Type::text},
        {"space_smoothing", Type::number}, {"time_smoothing", Type::number},
        {"climate_smoothing", Type::number}, {"season_smoothing", Type::number},
        {"halo", Type::integer}, {"tolerance", Type::number}}},
      {"seasons",
       {{"input", Type::text}, {"period", Type::text}, {"years", Type::text},
        {"date_marks", Type::text}, {"prominence", Type::number}, {"threshold", Type::number},
        {"name", Type::text}, {"compress", Type::text}}},
      {"compare", {{"input", Type::text}, {"zones", Type::text}, {"top", Type::integer}}},
      {"suitability",
       {{"day", Type::text}, {"night", Type::text}, {"tmin", Type::text}, {"tmax", Type::text},
        {"temperature", Type::text}, {"model", Type::text}, {"parasite", Type::text},
        {"window", Type::pair}, {"period", Type::text}, {"years", Type::text},
        {"threshold", Type::number}, {"units", Type::text}, {"day_hour", Type::number},
        {"night_hour", Type::number}, {"date_marks", Type::text}, {"parameters", Type::text},
        {"name", Type::text}, {"compress", Type::text}}},
      {"index",
       {{"red", Type::text}, {"nir", Type::text}, {"blue", Type::text}, {"red_band", Type::integer},
        {"nir_band", Type::integer}, {"blue_band", Type::integer}, {"index", Type::text},
        {"name", Type::text}, {"compress", Type::text}}},
  };
  return keys;
}

[[noreturn]] void fail(const std::string& path, const toml::source_region& where, const std::string& reason) {
  throw UsageError(fmt::format("{}:{}", path, where.begin.line), reason);
}

const char* type_name(Type t) {
  switch (t) {
    case Type::text: return "a string";
    case Type::number: return "a number";
    case Type::integer: return "an integer";
    case Type::boolean: return "true or false";
    case Type::text_or_number: return "a number or a string";
    case Type::pair: return "an array of two numbers";
    case Type::texts: return "an array of strings";
  }
  return "?";
}

std::string number_text(double v) { return fmt::format("{:.17g}", v); }

// The value as canonical text, after checking its type.
std::string checked_text(const std::string& path, const std::string& key, const toml::node& node, Type type) {
  auto wrong = [&] { fail(path, node.source(), fmt::format("'{}' must be {}", key, type_name(type))); };
  switch (type) {
    case Type::text:
      if (!node.is_string()) wrong();
      return *node.value<std::string>();
    case Type::number:
      if (!node.is_number()) wrong();
      return number_text(*node.value<double>());
    case Type::integer:
      if (!node.is_integer()) wrong();
      return std::to_string(*node.value<std::int64_t>());
    case Type::boolean:
      if (!node.is_boolean()) wrong();
      return *node.value<bool>() ? "true" : "false";
    case Type::text_or_number:
      if (node.is_string()) return *node.value<std::string>();
      if (!node.is_number()) wrong();
      return number_text(*node.value<double>());
    case Type::pair: {
      const toml::array* a = node.as_array();
      if (!a || a->size() != 2 || !(*a)[0].is_number() || !(*a)[1].is_number()) wrong();
      return number_text(*(*a)[0].value<double>()) + "," + number_text(*(*a)[1].value<double>());
    }
    case Type::texts: {
      const toml::array* a = node.as_array();
      if (!a) wrong();
      std::string text;
      for (const toml::node& e : *a) {
        if (!e.is_string()) wrong();
        text += (text.empty() ? "" : ",") + *e.value<std::string>();
      }
      return text;
    }
  }
  return {};
}

std::string resolve(const std::string& folder, const std::string& path) {
  if (path.empty() || fs::path(path).is_absolute() || path.find(':') != std::string::npos) {
    // NETCDF:"file":var keeps its form; resolve the file inside it.
    const auto q1 = path.find('"'), q2 = path.rfind('"');
    if (q1 != std::string::npos && q2 > q1 && !fs::path(path.substr(q1 + 1, q2 - q1 - 1)).is_absolute())
      return path.substr(0, q1 + 1) + (fs::path(folder) / path.substr(q1 + 1, q2 - q1 - 1)).string() +
             path.substr(q2);
    return path;
  }
  return (fs::path(folder) / path).lexically_normal().string();
}

}  // namespace

Job read_job(const std::string& path) {
  Job job;
  job.path = path;
  job.folder = fs::absolute(path).parent_path().string();
  if (!fs::exists(path)) throw UsageError(path, "no such job file");
  toml::table root;
  try {
    root = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    throw UsageError(fmt::format("{}:{}", path, e.source().begin.line), std::string(e.description()));
  }
  for (auto&& [key, node] : root) {
    const std::string k(key.str());
    if (k != "job" && k != "inputs" && k != "step")
      fail(path, key.source(), "unknown section '" + k + "' (expected [job], [inputs.NAME], [[step]])");
  }
  if (const toml::table* t = root["job"].as_table()) {
    for (auto&& [key, node] : *t) {
      const std::string k(key.str());
      if (k == "name") job.name = checked_text(path, k, node, Type::text);
      else if (k == "out") job.out = resolve(job.folder, checked_text(path, k, node, Type::text));
      else if (k == "threads") job.threads = std::stoi(checked_text(path, k, node, Type::integer));
      else if (k == "memory") job.memory = checked_text(path, k, node, Type::text);
      else fail(path, key.source(), "unknown key '" + k + "' in [job] (name, out, threads, memory)");
    }
  } else if (root.contains("job")) {
    fail(path, root["job"].node()->source(), "[job] must be a table");
  }
  if (const toml::table* inputs = root["inputs"].as_table()) {
    for (auto&& [name_key, node] : *inputs) {
      const toml::table* t = node.as_table();
      if (!t) fail(path, node.source(), "inputs." + std::string(name_key.str()) + " must be a table");
      JobInput input;
      input.name = std::string(name_key.str());
      for (auto&& [key, value] : *t) {
        const std::string k(key.str());
        if (k == "stack") input.stack = resolve(job.folder, checked_text(path, k, value, Type::text));
        else if (k == "qa") input.qa = resolve(job.folder, checked_text(path, k, value, Type::text));
        else if (k == "keep") input.keep = checked_text(path, k, value, Type::text);
        else if (k == "scale") input.scale = std::stod(checked_text(path, k, value, Type::number));
        else if (k == "offset") input.offset = std::stod(checked_text(path, k, value, Type::number));
        else if (k == "nodata") input.nodata = std::stod(checked_text(path, k, value, Type::number));
        else if (k == "band") input.band = std::stoi(checked_text(path, k, value, Type::integer));
        else if (k == "valid_range") {
          const std::string pair = checked_text(path, k, value, Type::pair);
          input.valid_min = std::stod(pair.substr(0, pair.find(',')));
          input.valid_max = std::stod(pair.substr(pair.find(',') + 1));
        } else {
          fail(path, key.source(),
               "unknown key '" + k + "' in [inputs." + input.name +
                   "] (stack, qa, keep, scale, offset, nodata, valid_range, band)");
        }
      }
      if (input.stack.empty()) fail(path, node.source(), "[inputs." + input.name + "] needs 'stack'");
      if (!input.qa.empty() && input.keep.empty())
        fail(path, node.source(), "[inputs." + input.name + "] has 'qa' but no 'keep' rule");
      job.inputs[input.name] = input;
    }
  }
  const toml::array* steps = root["step"].as_array();
  if (!steps || steps->empty()) throw UsageError(path, "no [[step]]: nothing to do");
  std::set<std::string> known;
  for (const auto& [name, input] : job.inputs) known.insert(name);
  for (const toml::node& node : *steps) {
    const toml::table* t = node.as_table();
    if (!t) fail(path, node.source(), "each [[step]] must be a table");
    JobStep step;
    step.line = int(node.source().begin.line);
    const toml::node* kind = t->get("do");
    if (!kind || !kind->is_string()) fail(path, node.source(), "a [[step]] needs 'do' = index, fill, seasons, compare or suitability");
    step.kind = *kind->value<std::string>();
    const auto spec = step_keys().find(step.kind);
    if (spec == step_keys().end())
      fail(path, kind->source(), "unknown step '" + step.kind + "' (index, fill, seasons, compare, suitability)");
    const toml::node* id = t->get("id");
    step.id = id && id->is_string() ? *id->value<std::string>() : step.kind;
    if (step.id.empty() || step.id.find_first_of("/\\. ") != std::string::npos)
      fail(path, node.source(), "step id '" + step.id + "' must be a plain name (it names a folder)");
    if (known.count(step.id)) fail(path, node.source(), "step id '" + step.id + "' is already used");
    for (auto&& [key, value] : *t) {
      const std::string k(key.str());
      if (k == "do" || k == "id") continue;
      const auto found = std::find_if(spec->second.begin(), spec->second.end(),
                                      [&](const Key& key_spec) { return k == key_spec.name; });
      if (found == spec->second.end()) {
        std::string allowed;
        for (const Key& key_spec : spec->second) allowed += std::string(allowed.empty() ? "" : ", ") + key_spec.name;
        fail(path, key.source(), "unknown key '" + k + "' in a '" + step.kind + "' step (" + allowed + ")");
      }
      step.options[k] = checked_text(path, k, value, found->type);
      if (k == "input" || k == "red" || k == "nir" || k == "blue" || k == "day" || k == "night" ||
          k == "tmin" || k == "tmax" || k == "temperature") {
        if (!known.count(step.options[k]))
          fail(path, value.source(), "'" + step.options[k] + "' is neither an input nor an earlier step");
        step.inputs.push_back(step.options[k]);
      }
      if (k == "zones" || k == "parameters") step.options[k] = resolve(job.folder, step.options[k]);
    }
    if (step.kind == "index" && (!step.options.count("red") || !step.options.count("nir")))
      fail(path, node.source(), "an 'index' step needs 'red' and 'nir'");
    if (step.kind == "suitability" && step.inputs.empty())
      fail(path, node.source(), "a 'suitability' step needs 'day' and 'night', 'tmin' and 'tmax', or 'temperature'");
    if (step.kind != "index" && step.kind != "suitability" && !step.options.count("input"))
      fail(path, node.source(), "a '" + step.kind + "' step needs 'input'");
    known.insert(step.id);
    job.steps.push_back(std::move(step));
  }
  return job;
}

}  // namespace kalends::detail
