#include "pipeline/job_file.hpp"

#include <toml++/toml.h>

#include <algorithm>
#include <cctype>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <limits>
#include <cerrno>
#include <cstring>
#include <fstream>
#include <fmt/format.h>
#include <set>

#include "io/file_glob.hpp"
#include "io/output_set.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/qa_rule.hpp"
#include "pipeline/step_kind.hpp"

namespace kalends::detail {

namespace {

namespace fs = std::filesystem;

using Type = KeyType;

[[noreturn]] void fail(const std::string& path, const toml::source_region& where, const std::string& reason) {
  throw UsageError(fmt::format("{}:{}", path, where.begin.line), reason);
}

// Each "--option" a message names as its job key in quotes ("--every" as 'every',
// "--day-time" as 'day_hour'), the keys in order into `keys`.
std::string options_as_keys(std::string text, std::vector<std::string>* keys = nullptr) {
  for (std::size_t at = text.find("--"); at != std::string::npos; at = text.find("--", at)) {
    std::size_t end = at + 2;
    while (end < text.size() && (std::isalnum(static_cast<unsigned char>(text[end])) || text[end] == '-')) ++end;
    const std::string option = text.substr(at, end - at);
    std::string key = option.substr(2);
    std::replace(key.begin(), key.end(), '-', '_');
    for (const OptionKey& pair : option_keys())  // options whose key has another name
      if (option == pair.option) key = pair.key;
    if (keys) keys->push_back(key);
    text.replace(at, end - at, "'" + key + "'");
  }
  return text;
}

const char* type_name(Type t) {
  switch (t) {
    case Type::text: return "a string";
    case Type::number: return "a number";
    case Type::integer: return "an integer";
    case Type::boolean: return "true or false";
    case Type::number_or_auto: return "a number or \"auto\"";
    case Type::pair: return "an array of two numbers";
    case Type::texts: return "an array of strings (or numbers)";
  }
  return "?";
}

// The shortest text that reads back as the same number (0.003, not 0.0030000000000000001).
std::string number_text(double v) { return fmt::format("{}", v); }

// A number node's value. toml++ gives no double for an integer that a double cannot hold
// exactly (99999999999999999): dereferenced, that empty value had been read as garbage.
double number_of(const toml::node& node) {
  if (node.is_integer()) return double(*node.value<std::int64_t>());
  return *node.value<double>();
}

// Reads the step's values as it would run them, with every input resolved to its own name, so
// that a value it cannot use fails here, naming the key and its line. The kinds name options
// as the command line does ("--date-marks 'x'"); the key is the same with '_' for '-'.
void check_values(const std::string& path, const StepKind& kind, const JobStep& step, const toml::table& table,
                  const Job& job) {
  StepContext context{step.options};
  context.job_path = path;
  context.folder = (std::filesystem::path(job.out) / step.id).string();
  context.out = job.out;
  context.resolve = [&job](const std::string& name) {
    ResolvedInput in;
    in.pattern = name;
    if (!job.inputs.count(name)) in.folder = name;  // an earlier step
    return in;
  };
  try {
    kind.check_values(context);
  } catch (const UsageError& e) {
    // The options the error names, in its subject ("--every '2W'", "--day-time/--night-time")
    // and its reason ("reads the same band as --red"), each as its job key; named at the line of
    // the first key the step gives.
    std::vector<std::string> keys;
    const std::string shown = options_as_keys(e.where(), &keys);
    const std::string reason = options_as_keys(e.reason());
    const toml::node* given = nullptr;
    for (const std::string& key : keys)
      if (!given) given = table.get(key);
    if (given) fail(path, given->source(), shown + ": " + reason);
    fail(path, table.source(), "step '" + step.id + "': " + shown + ": " + reason);
  } catch (const InputError& e) {
    // A file the step reads at check time (the survey points): named, at the step's line.
    fail(path, table.source(), "step '" + step.id + "': " + e.what());
  }
}

// The value as canonical text, after checking its type.
// A string node's text. TOML allows "\u0000"; a path cut there had named a different file
// (found by fuzzing).
std::string text_of(const std::string& path, const std::string& key, const toml::node& node) {
  std::string text = *node.value<std::string>();
  if (text.find('\0') != std::string::npos) fail(path, node.source(), fmt::format("'{}' holds a NUL character", key));
  return text;
}

std::string checked_text(const std::string& path, const std::string& key, const toml::node& node, Type type) {
  auto wrong = [&] { fail(path, node.source(), fmt::format("'{}' must be {}", key, type_name(type))); };
  switch (type) {
    case Type::text:
      if (!node.is_string()) wrong();
      return text_of(path, key, node);
    case Type::number:
      if (!node.is_number()) wrong();
      return number_text(number_of(node));
    case Type::integer: {
      if (!node.is_integer()) wrong();
      // Every whole-number key is an int: 2^31 had ended in "kalends: stoi", exit 1.
      const std::int64_t v = *node.value<std::int64_t>();
      if (v < std::numeric_limits<int>::min() || v > std::numeric_limits<int>::max())
        fail(path, node.source(), fmt::format("'{}' = {} is out of range", key, v));
      return std::to_string(v);
    }
    case Type::boolean:
      if (!node.is_boolean()) wrong();
      return *node.value<bool>() ? "true" : "false";
    case Type::number_or_auto:
      if (node.is_string()) {  // "auto", or a number written as a string ("10")
        const std::string text = *node.value<std::string>();
        if (text == "auto") return text;
        char* end = nullptr;
        const double v = std::strtod(text.c_str(), &end);
        if (text.empty() || *end != '\0' || !std::isfinite(v)) wrong();
        return number_text(v);
      }
      if (!node.is_number()) wrong();
      return number_text(number_of(node));
    case Type::pair: {
      const toml::array* a = node.as_array();
      if (!a || a->size() != 2 || !(*a)[0].is_number() || !(*a)[1].is_number()) wrong();
      return number_text(number_of((*a)[0])) + "," + number_text(number_of((*a)[1]));
    }
    case Type::texts: {
      const toml::array* a = node.as_array();
      if (!a) wrong();
      std::string text;
      // Numbers too, as their text: `extent = [-5, 4, 3, 12]` as other number lists are written.
      for (const toml::node& e : *a) {
        if (!text.empty()) text += ',';
        if (e.is_string()) text += text_of(path, key, e);
        else if (e.is_integer()) text += std::to_string(*e.value<std::int64_t>());
        else if (e.is_floating_point()) text += fmt::format("{}", *e.value<double>());
        else wrong();
      }
      return text;
    }
  }
  return {};
}

// A path key's text: "~" is no home folder in a job file (no shell expands it), and it had
// made a folder named "~" beside the job file.
std::string path_text(const std::string& path, const std::string& key, const toml::node& node) {
  std::string text = checked_text(path, key, node, Type::text);
  if (text == "~" || text.rfind("~/", 0) == 0)
    fail(path, node.source(), "'" + key + "' '" + text + "': '~' is not expanded in a job file; give the full path or "
                                                           "one relative to the job file");
  return text;
}

// A path of the job file, relative to its folder. A pattern's folder part is written as a
// literal (a job in 'proj [2023]' had read 'proj 2/ndvi/*.tif').
std::string resolve(const std::string& folder, const std::string& path, bool pattern = false) {
  // Escaped only where the rest is a pattern: a plain file's path stays a path GDAL opens.
  auto base = [&](const std::string& rest) {
    return pattern && detail::has_glob_characters(rest) ? detail::glob_escape(folder) : folder;
  };
  // NETCDF:"file":var keeps its form; resolve the file inside it. Only a quote after a colon
  // opens one: a folder named 'say "hi"' is a folder.
  if (const auto parts = detail::connection_parts(path)) {
    if (fs::path(parts->files).is_absolute()) return path;
    return parts->prefix + (fs::path(base(parts->files)) / parts->files).string() + parts->suffix;
  }
  if (path.empty() || fs::path(path).is_absolute() || path.find(':') != std::string::npos) return path;
  return (fs::path(base(path)) / path).lexically_normal().string();
}

}  // namespace

Job read_job(const std::string& path) {
  Job job;
  job.path = path;
  job.folder = fs::absolute(path).parent_path().string();
  if (!fs::exists(path)) throw UsageError(path, "no such job file");
  if (fs::is_directory(path)) throw UsageError(path, "is a folder, not a job file");
  if (std::ifstream probe(path); !probe)
    throw UsageError(path, std::string("cannot read the job file: ") + std::strerror(errno));
  toml::table root;
  try {
    root = toml::parse_file(path);
  } catch (const toml::parse_error& e) {
    // Line 0: the file could not be opened at all (no permission), which has no line to name.
    const auto line = e.source().begin.line;
    throw UsageError(line > 0 ? fmt::format("{}:{}", path, line) : path, std::string(e.description()));
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
      else if (k == "out") job.out = resolve(job.folder, path_text(path, k, node));
      else if (k == "threads") {
        job.threads = std::stoi(checked_text(path, k, node, Type::integer));
        // As --threads (0 to 4096): 5000 had been taken here.
        if (job.threads < 0 || job.threads > 4096)
          fail(path, node.source(), "'threads' must be 0 (all cores) to 4096");
      }
      else if (k == "memory") {
        job.memory = checked_text(path, k, node, Type::text);
        job.memory_line = int(node.source().begin.line);
        // Checked here, so that --dry-run and `kalends plan` catch it, naming the line.
        try {
          parse_memory_size(job.memory);
        } catch (const UsageError& e) {
          fail(path, node.source(), "'memory' = '" + job.memory + "': " + e.reason());
        }
      }
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
        // A job reads each input file to know what changed since the last run; GDAL's virtual
        // file systems (a stack inside a zip) have no files it can read so.
        if (k == "stack" || k == "qa") {
          const std::string file = detail::file_in_connection(path_text(path, k, value));
          if (file.rfind("/vsi", 0) == 0)
            fail(path, value.source(), "'" + k + "' inside " + file.substr(0, file.find('/', 1) + 1) +
                                           ": a job checks each input file for changes, which it cannot do there; "
                                           "unpack the files into a folder (the commands read such patterns)");
        }
        if (k == "stack") {
          input.stack = resolve(job.folder, path_text(path, k, value), true);
          input.stack_line = int(value.source().begin.line);
        } else if (k == "qa") {
          input.qa = resolve(job.folder, path_text(path, k, value), true);
          input.qa_line = int(value.source().begin.line);
        }
        else if (k == "keep") {
          input.keep = checked_text(path, k, value, Type::text);
          // Parsed here, as the file is read: a typo had stopped the run at the step that reads
          // the input, after the steps before it, and every later step with it.
          try {
            QaRule::parse(input.keep);
          } catch (const UsageError& e) {
            fail(path, value.source(), "'keep' '" + input.keep + "': " + e.reason());
          }
        }
        else if (k == "scale" || k == "offset") {
          const double number = std::stod(checked_text(path, k, value, Type::number));
          // As the command's --scale and --offset (Stack::open), here with the line.
          if (const std::string problem = scale_or_offset_problem(k == "scale", number); !problem.empty())
            fail(path, value.source(), fmt::format("'{}' = {:g}: {}", k, number, problem));
          (k == "scale" ? input.scale : input.offset) = number;
        }
        else if (k == "nodata") input.nodata = std::stod(checked_text(path, k, value, Type::number));
        else if (k == "band") input.band = std::stoi(checked_text(path, k, value, Type::integer));
        else if (k == "qa_band") input.qa_band = std::stoi(checked_text(path, k, value, Type::integer));
        else if (k == "valid_range") {
          const std::string pair = checked_text(path, k, value, Type::pair);
          input.valid_min = std::stod(pair.substr(0, pair.find(',')));
          input.valid_max = std::stod(pair.substr(pair.find(',') + 1));
          if (!(*input.valid_min < *input.valid_max))
            fail(path, value.source(), fmt::format("'valid_range' = [{:g}, {:g}]: the minimum must be below the maximum",
                                                   *input.valid_min, *input.valid_max));
        } else {
          fail(path, key.source(),
               "unknown key '" + k + "' in [inputs." + input.name +
                   "] (stack, qa, keep, scale, offset, nodata, valid_range, band, qa_band)");
        }
      }
      if (input.stack.empty()) fail(path, node.source(), "[inputs." + input.name + "] needs 'stack'");
      if (input.band < 1 || input.qa_band < 1)
        fail(path, node.source(), "[inputs." + input.name + "]: bands are numbered from 1");
      if (!input.qa.empty() && input.keep.empty())
        fail(path, node.source(), "[inputs." + input.name + "] has 'qa' but no 'keep' rule");
      if (input.qa.empty() && !input.keep.empty())
        fail(path, node.source(), "[inputs." + input.name + "] has a 'keep' rule but no 'qa' stack to apply it to");
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
    if (!kind || !kind->is_string())
      fail(path, node.source(), "a [[step]] needs 'do' = " + step_kind_names());
    step.kind = *kind->value<std::string>();
    const StepKind* spec = find_step_kind(step.kind);
    if (!spec) fail(path, kind->source(), "unknown step '" + step.kind + "' (" + step_kind_names() + ")");
    const toml::node* id = t->get("id");
    // Any other type had been taken as no id at all (id = 1.5 named the step after its kind).
    if (id && !id->is_string()) fail(path, id->source(), "'id' must be text");
    step.id = id ? *id->value<std::string>() : step.kind;
    if (step.id.empty() || step.id.find_first_of("/\\. ") != std::string::npos ||
        std::any_of(step.id.begin(), step.id.end(), [](char c) { return static_cast<unsigned char>(c) < 0x20; }))
      fail(path, node.source(), "step id '" + step.id + "' must be a plain name (it names a folder)");
    if (known.count(step.id)) fail(path, node.source(), "step id '" + step.id + "' is already used");
    for (auto&& [key, value] : *t) {
      const std::string k(key.str());
      if (k == "do" || k == "id") continue;
      const auto found = std::find_if(spec->keys.begin(), spec->keys.end(),
                                      [&](const StepKey& key_spec) { return k == key_spec.name; });
      if (found == spec->keys.end()) {
        std::string allowed;
        for (const StepKey& key_spec : spec->keys) allowed += std::string(allowed.empty() ? "" : ", ") + key_spec.name;
        // The command line's name for a key of this step ('day_time' for --day-time): say which.
        std::string option = "--" + k;
        std::replace(option.begin(), option.end(), '_', '-');
        std::string hint;
        for (const OptionKey& pair : option_keys())
          if (option == pair.option && k != pair.key &&
              std::any_of(spec->keys.begin(), spec->keys.end(),
                          [&](const StepKey& key_spec) { return std::string(pair.key) == key_spec.name; }))
            hint = fmt::format("; the command line's {} is '{}' here", pair.option, pair.key);
        fail(path, key.source(), "unknown key '" + k + "' in a '" + step.kind + "' step (" + allowed + ")" + hint);
      }
      step.options[k] = found->role == StepKey::Role::path ? path_text(path, k, value)
                                                           : checked_text(path, k, value, found->type);
      // A step's outputs are named after it inside the step's folder: '../x' had written its
      // layers outside (seasons) or failed only when the step ran (fill).
      if (k == "name") {
        try {
          detail::require_plain_name(step.options[k], "name");
        } catch (const UsageError& e) {
          fail(path, value.source(), std::string(e.what()));
        }
      }
      if (found->role == StepKey::Role::reads) {
        // a texts key names several inputs or steps (joined by ',' above)
        const std::vector<std::string> names =
            found->type == Type::texts ? split_list(step.options[k]) : std::vector<std::string>{step.options[k]};
        // input = [] had passed --dry-run; the run then failed with "no raster layers found".
        // (A report's empty 'layers' is named by the step's own check.)
        if (names.empty() && k == "input") fail(path, value.source(), "'input' names no input or step");
        for (const std::string& name : names) {
          if (!known.count(name))
            fail(path, value.source(), "'" + name + "' is neither an input nor an earlier step");
          if (found->step_kind) {
            const auto earlier = std::find_if(job.steps.begin(), job.steps.end(),
                                              [&](const JobStep& s) { return s.id == name; });
            if (earlier == job.steps.end() || earlier->kind != found->step_kind)
              fail(path, value.source(), "'" + k + "' must name a '" + found->step_kind + "' step; '" + name +
                                             "' is " + (earlier == job.steps.end() ? "an input" : "a '" + earlier->kind + "' step"));
          }
          step.inputs.push_back(name);
        }
      }
      if (found->role == StepKey::Role::path) {
        step.options[k] = resolve(job.folder, step.options[k]);
        // A file the step reads (survey points, a study area, zones): missing, the run would
        // stop at this step after the earlier ones. A pattern ('tiles/{tile}/') is not a file.
        const std::string& file = step.options[k];
        std::error_code ec;
        if (file.find('{') == std::string::npos && !detail::has_glob_characters(file) &&
            !std::filesystem::exists(file, ec))
          fail(path, value.source(), "'" + k + "': no such file: " + file);
      }
    }
    if (spec->check)
      if (const std::string mistake = spec->check(step.options); !mistake.empty())
        fail(path, node.source(), mistake);
    if (spec->check_values) check_values(path, *spec, step, *t, job);
    known.insert(step.id);
    job.steps.push_back(std::move(step));
  }
  return job;
}

}  // namespace kalends::detail
