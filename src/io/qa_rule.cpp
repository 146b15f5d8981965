#include <algorithm>
#include <cctype>
#include <charconv>
#include <string>

#include "kalends/error.hpp"
#include "kalends/qa_rule.hpp"

namespace kalends {

namespace {

class Cursor {
 public:
  explicit Cursor(std::string_view text) : text_(text) {}
  void skip_space() {
    while (pos_ < text_.size() && std::isspace(static_cast<unsigned char>(text_[pos_]))) ++pos_;
  }
  bool done() {
    skip_space();
    return pos_ >= text_.size();
  }
  bool word(std::string_view w) {
    skip_space();
    if (text_.substr(pos_, w.size()) != w) return false;
    const std::size_t end = pos_ + w.size();
    // A word must not run into letters ("bitsX"); digits may follow ("bits0-1").
    if (end < text_.size() && std::isalpha(static_cast<unsigned char>(text_[end])) &&
        std::isalpha(static_cast<unsigned char>(w.back())))
      return false;
    pos_ = end;
    return true;
  }
  bool symbol(std::string_view s) {
    skip_space();
    if (text_.substr(pos_, s.size()) != s) return false;
    pos_ += s.size();
    return true;
  }
  std::uint32_t number(std::string_view what) {
    skip_space();
    std::uint64_t v = 0;
    const char* begin = text_.data() + pos_;
    int base = 10;
    if (text_.substr(pos_, 2) == "0x" || text_.substr(pos_, 2) == "0b") {
      base = text_[pos_ + 1] == 'x' ? 16 : 2;
      begin += 2;
    }
    if (begin < text_.data() + text_.size() && *begin == '-')
      fail("a QA value is read as its unsigned bits: write a negative stored value as such (-1 is 65535 in 16-bit "
           "QA, 255 in 8-bit)");
    auto [ptr, ec] = std::from_chars(begin, text_.data() + text_.size(), v, base);
    if (ec != std::errc() || v > 0xffffffffull) fail("expected " + std::string(what));
    pos_ = std::size_t(ptr - text_.data());
    return std::uint32_t(v);
  }
  [[noreturn]] void fail(const std::string& what) const {
    throw UsageError("--keep '" + std::string(text_) + "'",
                     what + " at position " + std::to_string(pos_ + 1));
  }

 private:
  std::string_view text_;
  std::size_t pos_ = 0;
};

}  // namespace

QaRule QaRule::parse(std::string_view text) {
  QaRule rule;
  rule.text_ = std::string(text);
  Cursor c(text);
  if (c.done()) c.fail("empty rule");
  do {
    Clause clause;
    if (c.word("bits")) {
      const std::uint32_t low = c.number("first bit");
      if (!c.symbol("-")) c.fail("expected '-' in bit range");
      const std::uint32_t high = c.number("last bit");
      if (low > high || high > 31) c.fail("bit range must be 0..31, low to high");
      clause.shift = int(low);
      const int width = int(high - low + 1);
      clause.mask = width == 32 ? 0xffffffffu : ((1u << width) - 1u);
    } else if (c.word("bit")) {
      const std::uint32_t bit = c.number("bit number");
      if (bit > 31) c.fail("bit number must be 0..31");
      clause.shift = int(bit);
      clause.mask = 1u;
    } else if (c.word("value")) {
      clause.shift = 0;
      clause.mask = 0xffffffffu;
    } else {
      c.fail("expected 'bits A-B', 'bit N' or 'value'");
    }
    bool list = true;
    if (c.word("not")) {
      if (!c.word("in")) c.fail("expected 'in' after 'not'");
      clause.negate = true;
    } else if (c.word("in")) {
    } else if (c.symbol("==")) {
      list = false;
    } else if (c.symbol("!=")) {
      list = false;
      clause.negate = true;
    } else {
      c.fail("expected 'in', 'not in', '==' or '!='");
    }
    do {
      const std::uint32_t low = c.number("a number");
      std::uint32_t high = low;
      if (list && c.symbol("-")) high = c.number("end of range");
      if (high < low) c.fail("range end below its start");
      if (low > clause.mask) c.fail("value " + std::to_string(low) + " does not fit the field");
      clause.accepted.push_back({low, high});
    } while (list && c.symbol(","));
    rule.clauses_.push_back(std::move(clause));
  } while (c.word("and"));
  if (c.word("or")) c.fail("clauses are joined by 'and' only; for either of two values list both ('in 0,1')");
  if (!c.done()) c.fail("unexpected text");
  return rule;
}

int QaRule::highest_bit() const noexcept {
  int highest = -1;
  for (const Clause& clause : clauses_)
    if (clause.mask != 0xffffffffu || clause.shift != 0)
      for (int b = 31; b >= 0; --b)
        if ((clause.mask << clause.shift) >> b & 1u) {
          highest = std::max(highest, b);
          break;
        }
  return highest;
}

std::uint32_t QaRule::largest_value() const noexcept {
  std::uint32_t largest = 0;
  for (const Clause& clause : clauses_)
    if (clause.mask == 0xffffffffu && clause.shift == 0)
      for (const Range& r : clause.accepted) largest = std::max(largest, r.low);
  return largest;
}

bool QaRule::keep(std::uint32_t qa) const noexcept {
  for (const Clause& clause : clauses_) {
    const std::uint32_t field = (qa >> clause.shift) & clause.mask;
    bool in = false;
    for (const Range& r : clause.accepted)
      if (field >= r.low && field <= r.high) {
        in = true;
        break;
      }
    if (in == clause.negate) return false;
  }
  return true;
}

}  // namespace kalends
