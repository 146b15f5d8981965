// Small pieces for writing JSON by hand (reports, summaries): kalends writes, never parses, JSON.
#pragma once

#include <cmath>
#include <cstdint>
#include <cstdlib>
#include <fmt/format.h>
#include <map>
#include <string>

namespace kalends::detail {

/// `text` with quotes, backslashes and control characters escaped, for use inside "...". A
/// byte that is not part of valid UTF-8 (a file name in Latin-1) is written as the code point
/// of that byte (\u00e9): JSON is UTF-8, and the raw byte had made a summary no reader takes.
inline std::string json_escape(const std::string& text) {
  std::string out;
  const std::size_t n = text.size();
  for (std::size_t i = 0; i < n; ++i) {
    const unsigned char c = static_cast<unsigned char>(text[i]);
    if (c == '"' || c == '\\') {
      out += '\\';
      out += char(c);
    } else if (c < 0x20) {
      out += fmt::format("\\u{:04x}", int(c));
    } else if (c < 0x80) {
      out += char(c);
    } else {
      // The length of the sequence this lead byte starts, and whether its continuation bytes
      // follow (overlong forms and surrogates are rare enough in paths to pass).
      const std::size_t length = c >= 0xc2 && c <= 0xdf ? 2 : c >= 0xe0 && c <= 0xef ? 3 : c >= 0xf0 && c <= 0xf4 ? 4 : 0;
      bool valid = length > 0 && i + length <= n;
      for (std::size_t k = 1; valid && k < length; ++k) valid = (static_cast<unsigned char>(text[i + k]) & 0xc0) == 0x80;
      if (valid) {
        out.append(text, i, length);
        i += length - 1;
      } else {
        out += fmt::format("\\u{:04x}", int(c));
      }
    }
  }
  return out;
}

/// A number, or null where it is not finite (JSON has no NaN). The shortest text that reads back
/// as the same double: scores can be checked to any tolerance, and a choice given back exactly.
inline std::string json_number(double v) { return std::isfinite(v) ? fmt::format("{}", v) : "null"; }
/// The shortest text that reads back as the same double, for the parameters a file records:
/// six digits (%g) had recorded --lambda 123.456789012 as 123.457, which did not reproduce it.
inline std::string shortest_number(double v) { return fmt::format("{}", v); }

/// {"key": value, ...} of a method's parameters: a value that is a number as a JSON number (it
/// had been text, "0.05"), any other ("auto", "0.01,1e+06", "upper") as a string.
inline std::string json_parameters(const std::map<std::string, std::string>& parameters) {
  std::string text = "{";
  bool first = true;
  for (const auto& [key, value] : parameters) {
    char* end = nullptr;
    const double number = value.empty() ? NAN : std::strtod(value.c_str(), &end);
    const bool is_number = !value.empty() && end == value.c_str() + value.size() && std::isfinite(number) &&
                           value.find_first_of("xXpP") == std::string::npos;  // no hexadecimal forms
    if (is_number)
      text += fmt::format("{}\"{}\": {}", first ? "" : ", ", json_escape(key), json_number(number));
    else
      text += fmt::format("{}\"{}\": \"{}\"", first ? "" : ", ", json_escape(key), json_escape(value));
    first = false;
  }
  return text + "}";
}

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
