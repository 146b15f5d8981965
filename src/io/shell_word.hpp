// A word as a POSIX shell reads it back: command lines kalends records (KALENDS_COMMAND) or
// prints for the user to run (the sbatch line) must survive paths with spaces and quotes.
#pragma once

#include <string>

namespace kalends::detail {

/// `word` unchanged when it holds only characters no shell treats specially, else in single
/// quotes (a single quote inside written as '\'').
inline std::string shell_word(const std::string& word) {
  bool plain = !word.empty();
  for (const char c : word)
    plain = plain && ((c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
                      std::string("_@%+=:,./-").find(c) != std::string::npos);
  if (plain) return word;
  std::string quoted = "'";
  for (const char c : word) quoted += c == '\'' ? std::string("'\\''") : std::string(1, c);
  return quoted + "'";
}

}  // namespace kalends::detail
