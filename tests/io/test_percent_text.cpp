#include <catch2/catch.hpp>

#include "kalends/percent.hpp"

using kalends::percent_text;

TEST_CASE("a share is all or none only when it is", "[percent]") {
  CHECK(percent_text(1.0) == "100.0 %");
  CHECK(percent_text(0.0) == "0.0 %");
  // 15152 of 15154 withheld cells covered had read "100.0 %"; 3 of 82800 cells "0.0 %".
  CHECK(percent_text(15152.0 / 15154.0) == "> 99.9 %");
  CHECK(percent_text(3.0 / 82800.0) == "< 0.1 %");
  CHECK(percent_text(729.0 / 731.0, 0) == "> 99 %");
  CHECK(percent_text(0.0015) == "0.1 %");  // rounds to 0.1 % on its own
  CHECK(percent_text(0.9984) == "99.8 %");
  CHECK(percent_text(0.123) == "12.3 %");
  CHECK(percent_text(0.5, 0) == "50 %");
}
