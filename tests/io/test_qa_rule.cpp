#include <catch2/catch.hpp>

#include "kalends/error.hpp"
#include "kalends/qa_rule.hpp"

using namespace kalends;

TEST_CASE("QA keep rules on bit fields and values", "[io][qa]") {
  // MODIS MOD13 pixel reliability style: bits 0-1, 0 = good, 1 = marginal.
  const QaRule modis = QaRule::parse("bits0-1 in 0,1");
  CHECK(modis.keep(0b00));
  CHECK(modis.keep(0b01));
  CHECK_FALSE(modis.keep(0b10));
  CHECK_FALSE(modis.keep(0b11));
  CHECK(modis.keep(0b1101));  // higher bits do not matter

  const QaRule both = QaRule::parse("bits 0-1 == 0 and bit 15 == 0");
  CHECK(both.keep(0x0000));
  CHECK_FALSE(both.keep(0x8000));
  CHECK_FALSE(both.keep(0x0001));

  const QaRule value = QaRule::parse("value not in 5,7-9");
  CHECK(value.keep(6));
  CHECK_FALSE(value.keep(5));
  CHECK_FALSE(value.keep(8));
  CHECK(value.keep(10));

  const QaRule range = QaRule::parse("bits2-5 in 0-3");
  CHECK(range.keep(0b001100));  // field = 3
  CHECK_FALSE(range.keep(0b010000));  // field = 4

  CHECK(QaRule::parse("bit 3 != 1").keep(0));
  CHECK(QaRule::parse("value == 0x10").keep(16));
}

TEST_CASE("QA rules with mistakes are refused", "[io][qa]") {
  for (const char* bad : {"", "bits0-1", "bits 1-0 in 0", "bit 32 == 0", "bits0-1 in 4",
                          "colour in 1", "bits0-1 in 0,", "bits0-1 in 0 or bit 2 == 0",
                          "value in 3-1"}) {
    INFO(bad);
    CHECK_THROWS_AS(QaRule::parse(bad), UsageError);
  }
  // 'or' is named, not "unexpected text".
  CHECK_THROWS_WITH(QaRule::parse("bits0-1 in 0 or bit 2 == 0"), Catch::Contains("'and' only"));
}
