// The command line: a thin layer over the library. Errors are caught here, once, and become one
// line on stderr and an exit code (0 done, 1 failed, 2 bad input or options).
#include <sys/resource.h>

#include <CLI/CLI.hpp>
#include <fmt/format.h>
#include <regex>
#include <cctype>
#include <cstdio>
#include <iostream>
#include <new>
#include <filesystem>
#include <map>
#include <set>

#include "cli/commands.hpp"
#include "cli/stop_signals.hpp"
#include "io/shell_word.hpp"
#include "kalends/error.hpp"

namespace {

// Each worker opens every date of the stack; a large stack with many threads needs more file
// descriptors than the usual soft limit of 1024.
void raise_open_file_limit() {
  rlimit limit{};
  if (getrlimit(RLIMIT_NOFILE, &limit) == 0 && limit.rlim_cur < limit.rlim_max) {
    limit.rlim_cur = limit.rlim_max;
    setrlimit(RLIMIT_NOFILE, &limit);
  }
}

// A command-line mistake as one line naming it: an unknown command or option rather than
// CLI11's "A subcommand is required" or "The following arguments were not expected: 3 --lamda".
std::string parse_error_line(CLI::App& app, const CLI::ParseError& e, int argc, char** argv) {
  CLI::App* command = nullptr;
  for (CLI::App* sub : app.get_subcommands({}))
    if (sub->parsed()) command = sub;
  std::string commands;
  for (CLI::App* sub : app.get_subcommands({})) commands += (commands.empty() ? "" : ", ") + sub->get_name();
  if (!command) {
    for (int i = 1; i < argc; ++i)
      if (argv[i][0] != '-') return "unknown command '" + std::string(argv[i]) + "'; the commands: " + commands;
    return "give a command: " + commands + " (kalends --help says what each does)";
  }
  const std::string name = command->get_name();
  // An unknown option first: a missing required option is often its consequence (--outt).
  for (int i = 1; i < argc; ++i) {
      const std::string arg = argv[i];
      // Not options: values such as --offset -0.1.
      if (arg.size() < 2 || arg[0] != '-' || std::isdigit(static_cast<unsigned char>(arg[1])) || arg[1] == '.') continue;
      const std::string option = arg.substr(0, arg.find('='));
      if (!command->get_option_no_throw(option) && !app.get_option_no_throw(option))
        return name + ": unknown option '" + option + "' (kalends " + name + " --help lists them)";
  }
  std::string text = e.what();
  for (char& c : text)
    if (c == '\n') c = ' ';
  // std::regex recurses once per character: a value of 26,000 characters had overflowed the
  // stack (a crash). The middle of so long a text says nothing anyway.
  constexpr std::size_t longest = 600;
  if (text.size() > longest) text = text.substr(0, longest / 2) + "..." + text.substr(text.size() - longest / 4);
  // CLI11's wording of a bad value ("Could not convert: --seed = abc", "Value 2.5 not in range
  // 0 to 4096") as the option, the value and what it takes.
  auto kind_of = [&](const std::string& option) {
    const CLI::Option* o = command->get_option_no_throw(option);
    const std::string type = o ? o->get_type_name() : "";
    // "INT", or "INT:INT in [0 - 4096]" with a range check.
    const bool whole = type.rfind("INT", 0) == 0 || type.rfind("UINT", 0) == 0;
    return whole ? std::string("a whole number") : std::string("a number");
  };
  std::smatch m;
  static const std::regex conversion(R"(Could not convert: (--?[\w-]+) = (.*))");
  static const std::regex range(R"((--?[\w-]+): Value (.*) not in range (\S+) to (\S+))");
  static const std::regex missing(R"((--?[\w-]+): \d+ required .* missing)");
  static const std::regex repeated(R"((--?[\w-]+): At Most \d+ required but received \d+)");
  static const std::regex not_in(R"((--?[\w-]+): (.*) not in \{(.*)\})");
  if (std::regex_match(text, m, repeated)) return fmt::format("{}: {}: given more than once", name, m[1].str());
  if (std::regex_match(text, m, not_in)) {
    std::string choices = m[3].str();
    for (std::size_t at = choices.find(','); at != std::string::npos; at = choices.find(',', at + 2))
      choices.replace(at, 1, ", ");
    return fmt::format("{}: {}: '{}' is not one of {}", name, m[1].str(), m[2].str(), choices);
  }
  if (std::regex_match(text, m, missing)) return fmt::format("{}: {}: needs a value", name, m[1].str());
  if (std::regex_match(text, m, conversion)) {
    // A switch has no type name (CLI11 would read --smooth=true as one).
    if (const CLI::Option* o = command->get_option_no_throw(m[1].str()); o && o->get_type_name().empty())
      return fmt::format("{}: {}: is a switch and takes no value, or true or false ('{}' given)", name, m[1].str(),
                         m[2].str());
    return fmt::format("{}: {}: '{}' is not {}", name, m[1].str(), m[2].str(), kind_of(m[1].str()));
  }
  if (std::regex_match(text, m, range))
    return fmt::format("{}: {}: '{}' is not {} from {} to {}", name, m[1].str(), m[2].str(), kind_of(m[1].str()),
                       m[3].str(), m[4].str());
  // A pattern the shell expanded: its files arrive as extra arguments.
  if (dynamic_cast<const CLI::ExtrasError*>(&e) != nullptr) {
    std::vector<std::string> extras = command->remaining();
    for (const std::string& extra : app.remaining()) extras.push_back(extra);
    const auto files = std::count_if(extras.begin(), extras.end(),
                                     [](const std::string& extra) {
                                       std::error_code ec;  // a name too long for a file is no file
                                       return std::filesystem::is_regular_file(extra, ec);
                                     });
    if (files > 0)
      return fmt::format("{}: {} more files than the command takes (the first: {}); a pattern such as "
                         "'ndvi/*.tif' needs quotes, or the shell expands it into its files",
                         name, files, extras.front());
    if (!extras.empty())
      return fmt::format("{}: unexpected argument '{}' (kalends {} --help says what it takes)", name, extras.front(),
                         name);
  }
  return name + ": " + text;
}

}  // namespace

// An error is one line: a newline, tab or terminal escape in a file name (ESC [31m) had split
// it or reached the terminal as a command. Control characters are shown as \n, \t, \xHH.
static std::string one_line(const std::string& text) {
  std::string out;
  for (const char c : text) {
    const auto byte = static_cast<unsigned char>(c);
    if (c == '\n') out += "\\n";
    else if (c == '\t') out += "\\t";
    else if (c == '\r') out += "\\r";
    else if (byte < 0x20 || byte == 0x7f) out += fmt::format("\\x{:02x}", byte);
    else out += c;
  }
  return out;
}

int main(int argc, char** argv) {
  using namespace kalends;
  cli::install_stop_signals();
  raise_open_file_limit();
  CLI::App app{"kalends: gap-filled, quality-flagged covariate layers from satellite time series"};
  app.require_subcommand(1);
  app.fallthrough();  // -q and -v may also follow the subcommand
  app.set_version_flag("--version", KALENDS_VERSION);
  cli::GlobalOptions global;
  for (int i = 0; i < argc; ++i) global.command_line += (i ? " " : "") + detail::shell_word(argv[i]);
  app.add_flag("-q,--quiet", global.quiet, "Print only errors, notes on the data and cautions (no summaries or progress)");
  app.add_flag("-v,--verbose", global.verbose, "Print block sizes, kernel throughput and memory (kalends fill)");
  std::map<CLI::App*, cli::Action> actions;
  for (auto add : {&cli::add_inspect_command, &cli::add_fill_command, &cli::add_index_command, &cli::add_seasons_command,
                   &cli::add_compare_command, &cli::add_grid_command, &cli::add_validate_command, &cli::add_run_command,
                   &cli::add_status_command, &cli::add_plan_command,
                   &cli::add_diurnal_command, &cli::add_suitability_command,
                   &cli::add_extract_command, &cli::add_report_command}) {
    cli::Action action = add(app, global);
    actions[app.get_subcommands({}).back()] = std::move(action);
  }
  try {
    app.parse(argc, argv);
  } catch (const CLI::ParseError& e) {
    if (e.get_exit_code() == 0) return app.exit(e);  // --help, --version
    std::cerr << "kalends: " << one_line(parse_error_line(app, e, argc, argv)) << "\n";
    return 2;
  }
  try {
    for (auto& [command, action] : actions) {
      if (!command->parsed()) continue;
      // Commands that write a folder of layers: an --out naming an existing file is a slip
      // of the user's, not a failure to write.
      static const std::set<std::string> folder_outputs{"fill", "index", "seasons", "compare", "grid",
                                                         "validate", "diurnal", "suitability"};
      if (folder_outputs.count(command->get_name()) && command->count("--out") > 0) {
        const std::string out = command->get_option("--out")->as<std::string>();
        if (std::filesystem::exists(out) && !std::filesystem::is_directory(out))
          throw UsageError("--out '" + out + "'", "is a file; give a folder for the outputs");
      }
      // An empty value ('--every ""', or "$VAR" unset in a script) had been taken as the option
      // not given, exit 0. Where empty means something, the command says what (--date-column:
      // no dates; --out and --html: which name it needs).
      static const std::set<std::string> empty_allowed{"--date-column", "--out", "--html"};
      for (const CLI::Option* option : command->get_options()) {
        if (!option->nonpositional() || option->get_expected_min() == 0 || option->count() == 0) continue;
        const std::string name = option->get_name();
        if (empty_allowed.count(name)) continue;
        for (const std::string& value : option->results())
          if (value.empty()) throw UsageError(name, "needs a value ('' given)");
      }
      action();
    }
    return global.exit_code;
  } catch (const InputError& e) {
    std::cerr << "kalends: " << one_line(e.what()) << "\n";
    return 2;
  } catch (const UsageError& e) {
    std::cerr << "kalends: " << one_line(e.what()) << "\n";
    return 2;
  } catch (const Error& e) {
    std::cerr << "kalends: " << one_line(e.what()) << "\n";
    return 1;
  } catch (const std::filesystem::filesystem_error& e) {
    // A folder or file the user may not read (the library's own errors name theirs): the path
    // first, as every other error line, and exit 2 for a path the user gave that cannot be used.
    const std::string path = e.path1().empty() ? std::string("a path") : e.path1().string();
    std::cerr << "kalends: " << one_line(path) << ": " << e.code().message() << "\n";
    // A name longer than a file name can be is a path the user gave, too (it had exited 1).
    return e.code() == std::errc::permission_denied || e.code() == std::errc::filename_too_long ? 2 : 1;
  } catch (const std::bad_alloc&) {
    // It had said only "std::bad_alloc".
    // grid has no --memory: it holds each layer whole, so a smaller grid is its way out.
    std::cerr << "kalends: out of memory: give a smaller --memory budget (or job memory; for grid, a smaller extent or "
                 "a coarser resolution), or run where more memory is free\n";
    return 1;
  } catch (const std::exception& e) {
    std::cerr << "kalends: " << one_line(e.what()) << "\n";
    return 1;
  }
}
