#include "io/qa_pairing.hpp"

#include <fmt/format.h>

#include "io/gdal_session.hpp"
#include "kalends/error.hpp"

namespace kalends {

std::optional<QaRule> qa_rule_of(const std::string& qa_input, const std::string& keep, int qa_band) {
  if (!qa_input.empty() && keep.empty()) throw UsageError("--keep", "a keep rule is required with a QA stack (" + qa_input + ")");
  if (qa_input.empty() && !keep.empty()) throw UsageError("--keep", "given without a QA stack (--qa)");
  check_band(qa_band, "--qa-band");
  if (keep.empty()) return std::nullopt;
  return QaRule::parse(keep);
}

QaPairing pair_qa(const Stack& values, QaRule rule, const std::string& qa_input, int qa_band) {
  ValueRules qa_rules;
  qa_rules.band = qa_band;
  qa_rules.exclude = values.rules().exclude;
  Stack stack = Stack::open(qa_input, qa_rules);
  std::vector<std::size_t> layer_of = partners_by_date(values, stack, "QA");
  // A bit beyond the layers' width is always 0: a rule on it keeps or drops everything (a slip
  // for bit 15 on 16-bit QA). Every layer is checked: a stack may mix 8- and 16-bit files.
  for (const Layer& layer : stack.layers()) {
    const auto type = GDALDataType(layer.data_type);
    if (GDALDataTypeIsFloating(type)) continue;
    const int bits = GDALGetDataTypeSizeBits(type);
    if (rule.highest_bit() >= bits)
      throw UsageError("--keep '" + rule.text() + "'",
                       fmt::format("reads bit {}, beyond the {}-bit QA values of {} (bits 0-{})", rule.highest_bit(),
                                   bits, layer.path, bits - 1));
    // The same for a value (value == 70000 on 16-bit QA had dropped every observation, exit 0).
    if (bits < 32 && rule.largest_value() >= (std::uint64_t(1) << bits))
      throw UsageError("--keep '" + rule.text() + "'",
                       fmt::format("names the value {}, beyond the {}-bit QA values of {} (0-{})",
                                   rule.largest_value(), bits, layer.path, (std::uint64_t(1) << bits) - 1));
  }
  return QaPairing{std::move(rule), std::move(stack), std::move(layer_of)};
}

}  // namespace kalends
