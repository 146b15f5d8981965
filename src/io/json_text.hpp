// Small pieces for writing JSON by hand (reports, summaries): kalends writes, never parses, JSON.
#pragma once

#include <cmath>
#include <cstdint>
#include <fmt/format.h>
#include <map>
#include <string>

namespace kalends::detail {

/// `text` with quotes, backslashes and control characters escaped, for use inside "...".
inline std::string json_escape(const std::string& text) {
  std::string out;
  for (char c : text) {
    if (c == '"' || c == '\\') out += '\\';
    if (static_cast<unsigned char>(c) < 0x20) {
      out += fmt::format("\\u{:04x}", int(c));
      continue;
    }
    out += c;
  }
  return out;
}

/// A number, or null where it is not finite (JSON has no NaN). The shortest text that reads back
/// as the same double: scores can be checked to any tolerance, and a choice given back exactly.
inline std::string json_number(double v) { return std::isfinite(v) ? fmt::format("{}", v) : "null"; }

/// {"name": count, ...}. With an `indent`, one entry per line, indented two more than the
/// closing brace; without, all on one line.
inline std::string json_counts(const std::map<std::string, std::int64_t>& counts,
                               const std::string& indent = "") {
  if (counts.empty()) return "{}";
  std::string text = "{";
  bool first = true;
  for (const auto& [name, count] : counts) {
    if (!first) text += ",";
    text += indent.empty() ? (first ? "" : " ") : "\n" + indent + "  ";
    text += fmt::format("\"{}\": {}", json_escape(name), count);
    first = false;
  }
  return text + (indent.empty() ? "}" : "\n" + indent + "}");
}

}  // namespace kalends::detail
