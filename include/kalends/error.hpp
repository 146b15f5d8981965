// Errors carry the file (or option) they concern and the reason; the CLI turns them into one
// line and an exit code.
#pragma once

#include <stdexcept>
#include <string>

namespace kalends {

/// Base of every kalends error: `where` names the file, option or stage; `reason` says what is
/// wrong in plain words.
class Error : public std::runtime_error {
 public:
  Error(std::string where, std::string reason)
      : std::runtime_error(where.empty() ? reason : where + ": " + reason),
        where_(std::move(where)),
        reason_(std::move(reason)) {}
  const std::string& where() const noexcept { return where_; }
  const std::string& reason() const noexcept { return reason_; }

 private:
  std::string where_;
  std::string reason_;
};

/// The input data is unusable: unreadable file, mismatched grid, bad dates, missing QA partner.
class InputError : public Error {
  using Error::Error;
};

/// The user's options do not make sense (unknown method, bad rule, bad size).
class UsageError : public Error {
  using Error::Error;
};

/// Writing an output failed (disk full, permissions).
class OutputError : public Error {
  using Error::Error;
};

}  // namespace kalends
