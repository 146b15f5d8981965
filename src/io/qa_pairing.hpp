// A value stack's QA layers, paired date by date, and the rule that decides which values stay.
#pragma once

#include <optional>
#include <string>
#include <vector>

#include "kalends/qa_rule.hpp"
#include "kalends/stack.hpp"

namespace kalends {

struct QaPairing {
  QaRule rule;
  Stack stack;
  std::vector<std::size_t> layer_of;  // for each value layer, its QA layer
};

/// The keep rule of --qa, --keep and --qa-band, checked together before any input is opened:
/// nothing without a QA stack; UsageError for a rule without a QA stack or the reverse, or a
/// band below 1.
std::optional<QaRule> qa_rule_of(const std::string& qa_input, const std::string& keep, int qa_band);

/// Opens the QA stack (band `qa_band`, leaving out the files `values` leaves out) and pairs its
/// layers with those of `values` by date; InputError naming the file without a partner.
QaPairing pair_qa(const Stack& values, QaRule rule, const std::string& qa_input, int qa_band);

}  // namespace kalends
