// Keep rules on quality layers, written the way sensor manuals describe their QA bits.
#pragma once

#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

namespace kalends {

/// A rule deciding, from a QA value, whether the paired observation is kept.
///
/// Grammar (clauses joined by `and`):
///   field in LIST | field not in LIST | field == N | field != N
///   field: `bits A-B` (bits A to B inclusive, bit 0 least significant), `bit N`, or `value`
///   LIST: comma-separated numbers or ranges `lo-hi`
/// Example: `bits0-1 in 0,1 and bit 15 == 0`.
class QaRule {
 public:
  static QaRule parse(std::string_view text);  // throws UsageError
  bool keep(std::uint32_t qa) const noexcept;
  const std::string& text() const noexcept { return text_; }
  /// The highest bit a `bit` or `bits` clause reads (-1 when only `value` clauses), so that a
  /// rule can be checked against the QA layers' width.
  int highest_bit() const noexcept;
  /// The largest number a `value` clause names (the start of a range), 0 without one: a value
  /// beyond the QA layers' width never occurs.
  std::uint32_t largest_value() const noexcept;

 private:
  struct Range {
    std::uint32_t low, high;
  };
  struct Clause {
    std::uint32_t mask = 0xffffffffu;
    int shift = 0;
    bool negate = false;
    std::vector<Range> accepted;
  };
  std::string text_;
  std::vector<Clause> clauses_;
};

}  // namespace kalends
