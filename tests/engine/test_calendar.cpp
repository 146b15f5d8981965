#include <catch2/catch.hpp>

#include "cli/commands.hpp"
#include "engine/calendar.hpp"
#include "kalends/error.hpp"

using namespace kalends;

TEST_CASE("monthly period means are day-weighted and cover the grid", "[engine][calendar]") {
  std::vector<TimePoint> times;
  for (int i = 0; i < 10; ++i) times.push_back(TimePoint{(days_from_civil(2021, 1, 1) + 16 * i) * 86400});
  const TimeGrid grid = TimeGrid::build(times);  // 2021-01-01 .. 2021-05-25
  const auto periods = detail::period_means(grid, CalendarPeriod::parse("1M"));
  REQUIRE(periods.size() == 5);
  CHECK(periods[0].start.label() == "2021-01-01");
  CHECK(periods[0].days == 31);
  CHECK(periods[1].days == 28);
  CHECK(periods[4].days == 25);  // May covered to the 25th
  for (const auto& p : periods) {
    double sum = 0;
    for (double w : p.weights) sum += w;
    CHECK(sum == Approx(1.0));
  }
  // A linear curve z = slot: the period mean is the curve at the mean day of the period.
  // January: days 0 .. 30 -> mean day 15 = 15/16 slots.
  double mean = 0;
  for (std::size_t j = 0; j < periods[0].slots.size(); ++j) mean += periods[0].weights[j] * periods[0].slots[j];
  CHECK(mean == Approx(15.0 / 16));
}

TEST_CASE("a date marking a composite's start stands for its middle", "[engine][calendar]") {
  // 16-day composites dated at their first day from 2021-01-01: each value stands for the
  // composite's middle, 8 days later. The calendar then starts on 9 January (23 days of
  // January) and calendar day d reads the curve at d - 8: January's mean of z = slot is the
  // curve's mean over days 0 .. 22, slot 11 / 16 (worked by hand).
  std::vector<TimePoint> times;
  for (int i = 0; i < 10; ++i) times.push_back(TimePoint{(days_from_civil(2021, 1, 1) + 16 * i) * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const auto starts = detail::period_means(grid, CalendarPeriod::parse("1M"), DateMarks::start);
  REQUIRE(starts.size() == 6);
  CHECK(starts[0].days == 23);
  double mean = 0;
  for (std::size_t j = 0; j < starts[0].slots.size(); ++j) mean += starts[0].weights[j] * starts[0].slots[j];
  CHECK(mean == Approx(11.0 / 16));
  // The last composite (2021-05-25) stands for 2 June: June is covered to the 2nd.
  CHECK(starts[5].start.label() == "2021-06-01");
  CHECK(starts[5].days == 2);
  const auto ends = detail::period_means(grid, CalendarPeriod::parse("1M"), DateMarks::end);
  // Dated at their last day: each stands for 8 days earlier, so December 2020 comes first.
  CHECK(ends.front().start.label() == "2020-12-01");
  CHECK(ends.front().days == 8);  // 24 .. 31 December
}

TEST_CASE("N-day periods restart on 1 January", "[engine][calendar]") {
  std::vector<TimePoint> times{TimePoint{days_from_civil(2021, 12, 1) * 86400},
                               TimePoint{days_from_civil(2022, 1, 20) * 86400}};
  const auto periods = detail::period_means(TimeGrid::build(times), CalendarPeriod::parse("16d"));
  std::vector<std::string> starts;
  for (const auto& p : periods) starts.push_back(p.start.label());
  // DOY 321 (Nov 17), 337 (Dec 3), 353 (Dec 19, 13 days), then 2022 DOY 1, 17.
  CHECK(starts == std::vector<std::string>{"2021-11-17", "2021-12-03", "2021-12-19", "2022-01-01", "2022-01-17"});
  CHECK_THROWS_AS(CalendarPeriod::parse("2w"), UsageError);
  CHECK_THROWS_AS(CalendarPeriod::parse("0d"), UsageError);
}

TEST_CASE("memory sizes", "[cli]") {
  CHECK(cli::parse_memory("1G") == (std::int64_t(1) << 30));
  CHECK(cli::parse_memory("512M") == (std::int64_t(512) << 20));
  CHECK(cli::parse_memory("1.5GiB") == (std::int64_t(3) << 29));
  CHECK(cli::parse_memory("4096") == 4096);
  CHECK_THROWS_AS(cli::parse_memory("lots"), UsageError);
  CHECK_THROWS_AS(cli::parse_memory("5Q"), UsageError);
  CHECK_THROWS_AS(cli::parse_memory("-1G"), UsageError);
}
