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
  // Dated at their middles, the first composite stands for 24 December to 8 January and the
  // last for 17 May to 1 June (composite_spans): December 2020 and June 2021 are covered too.
  REQUIRE(periods.size() == 7);
  CHECK(periods[0].start.label() == "2020-12-01");
  CHECK(periods[0].days == 8);
  CHECK(periods[1].start.label() == "2021-01-01");
  CHECK(periods[1].days == 31);
  CHECK(periods[2].days == 28);
  CHECK(periods[5].days == 31);  // May, the curve held at the last composite's value after the 25th
  CHECK(periods[6].days == 1);   // 1 June
  for (const auto& p : periods) {
    double sum = 0;
    for (double w : p.weights) sum += w;
    CHECK(sum == Approx(1.0));
  }
  // A linear curve z = slot: the period mean is the curve at the mean day of the period, each
  // day read at its middle. January: days 0.5 .. 30.5 -> mean day 15.5 = 15.5/16 slots (15/16
  // before version 0.3.24, when days were read at 00:00).
  double mean = 0;
  for (std::size_t j = 0; j < periods[1].slots.size(); ++j) mean += periods[1].weights[j] * periods[1].slots[j];
  CHECK(mean == Approx(15.5 / 16));
}

TEST_CASE("a date marking a composite's start stands for its middle", "[engine][calendar]") {
  // 16-day composites dated at their first day from 2021-01-01: each value stands for the
  // composite's middle, 8 days later, and calendar day d reads the curve at its middle less 8,
  // d + 0.5 - 8. The first composite stands for 1 to 16 January (seasons' rule), so January has
  // its 31 days: 1 to 8 January hold the first composite's value (slot 0), 9 to 31 January read
  // days 0.5 .. 22.5 of the curve. January's mean of z = slot: (0.5 + 1.5 + ... + 22.5) / 16 /
  // 31 = 264.5 / 496 slots (worked by hand; 253 / 496 before version 0.3.24, days read at 00:00).
  std::vector<TimePoint> times;
  for (int i = 0; i < 10; ++i) times.push_back(TimePoint{(days_from_civil(2021, 1, 1) + 16 * i) * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  const auto starts = detail::period_means(grid, CalendarPeriod::parse("1M"), DateMarks::start);
  REQUIRE(starts.size() == 6);
  CHECK(starts[0].days == 31);
  double mean = 0;
  for (std::size_t j = 0; j < starts[0].slots.size(); ++j) mean += starts[0].weights[j] * starts[0].slots[j];
  CHECK(mean == Approx(264.5 / 496));
  // The last composite (2021-05-25) stands for 25 May to 9 June: June is covered to the 9th,
  // as extract and seasons give it those days.
  CHECK(starts[5].start.label() == "2021-06-01");
  CHECK(starts[5].days == 9);
  const auto ends = detail::period_means(grid, CalendarPeriod::parse("1M"), DateMarks::end);
  // Dated at their last day: the first stands for 17 December to 1 January, so December 2020
  // comes first.
  CHECK(ends.front().start.label() == "2020-12-01");
  CHECK(ends.front().days == 15);  // 17 .. 31 December
}

TEST_CASE("N-day periods restart on 1 January", "[engine][calendar]") {
  std::vector<TimePoint> times{TimePoint{days_from_civil(2021, 12, 1) * 86400},
                               TimePoint{days_from_civil(2022, 1, 20) * 86400}};
  const auto periods = detail::period_means(TimeGrid::build(times), CalendarPeriod::parse("16d"));
  std::vector<std::string> starts;
  for (const auto& p : periods) starts.push_back(p.start.label());
  // Dated at their middles, 50 days apart (the step): the first stands for 6 November on, the
  // last up to 13 February (composite_spans). DOY 305 (Nov 1), 321 (Nov 17), 337 (Dec 3), 353
  // (Dec 19, 13 days), then 2022 DOY 1, 17, 33.
  CHECK(starts == std::vector<std::string>{"2021-11-01", "2021-11-17", "2021-12-03", "2021-12-19", "2022-01-01",
                                           "2022-01-17", "2022-02-02"});
  CHECK_THROWS_AS(CalendarPeriod::parse("2w"), UsageError);
  CHECK_THROWS_AS(CalendarPeriod::parse("0d"), UsageError);
  // Either case, as 1m and 1M are: 16D had been refused while 1m was taken.
  CHECK(CalendarPeriod::parse("16D").label() == "16d");
  CHECK(CalendarPeriod::parse("1m").label() == "1M");
}

TEST_CASE("calendar periods of a season no composite covers are out of season", "[engine][calendar]") {
  // Summers only, as the Alaska MODIS stack: 8 composites a year from day of year 145 (24 May;
  // 2004 is a leap year) every 16 days, two years. With start marks a composite stands for 16
  // days from its date, so the last of a year (day 257) covers up to day 272 (28/29 September):
  // May to September are in season, October to April are not (dates worked by hand).
  std::vector<TimePoint> times;
  for (int year : {2004, 2005})
    for (int k = 0; k < 8; ++k)
      times.push_back(TimePoint{(days_from_civil(year, 1, 1) + 144 + 16 * k) * 86400});
  const TimeGrid grid = TimeGrid::build(times);
  for (DateMarks marks : {DateMarks::start, DateMarks::middle, DateMarks::end}) {
    const auto periods = detail::period_means(grid, CalendarPeriod::parse("1M"), marks);
    REQUIRE(periods.size() > 12);
    for (const auto& p : periods) {
      const int month = p.start.date().month;
      INFO(p.start.label());
      // Every mark covers June to August; May and September by at least a week either way.
      CHECK(p.in_season == (month >= 5 && month <= 9));
    }
  }
  // The edge months average only their days in season (start marks): May 2005 from the first
  // composite's date, 25 May (day 145 of 2005), to the 31st, 7 days; September 2004 from the
  // 1st to day 257 + 15 = 272, the 28th in a leap year; September 2005 to the 29th, the last
  // composite's last day (not the 22nd, its middle, where the grid ends); May 2004 from the
  // first composite's date, 24 May, 8 days (it had been left out: the grid starts on 1 June).
  // Their weights still sum to one.
  const auto starts = detail::period_means(grid, CalendarPeriod::parse("1M"), DateMarks::start);
  for (const auto& p : starts) {
    double sum = 0;
    for (double w : p.weights) sum += w;
    if (p.in_season) CHECK(sum == Approx(1.0));
    if (p.start.label() == "2005-05-01") CHECK(p.days == 7);
    if (p.start.label() == "2004-09-01") CHECK(p.days == 28);
    if (p.start.label() == "2005-09-01") CHECK(p.days == 29);
    if (p.start.label() == "2004-05-01") CHECK(p.days == 8);
    if (p.start.label() == "2005-07-01") CHECK(p.days == 31);
  }
  CHECK(starts.front().start.label() == "2004-05-01");
  // 16-day periods: the first (day 145 of 2004) and the last (day 257 of 2005) have 16 days, as
  // every year's, not 8 and 9.
  const auto sixteen = detail::period_means(grid, CalendarPeriod::parse("16d"), DateMarks::start);
  CHECK(sixteen.front().start.label() == "2004-05-24");
  CHECK(sixteen.front().days == 16);
  CHECK(sixteen.back().start.label() == "2005-09-14");
  CHECK(sixteen.back().days == 16);
  // A stack covering the whole year leaves every period in season, 8-day ones included.
  std::vector<TimePoint> all_year;
  for (int k = 0; k < 46; ++k) all_year.push_back(TimePoint{(days_from_civil(2021, 1, 1) + 16 * (k % 23) + 365 * (k / 23)) * 86400});
  const auto eight = detail::period_means(TimeGrid::build(all_year), CalendarPeriod::parse("8d"), DateMarks::start);
  for (const auto& p : eight) CHECK(p.in_season);
}

TEST_CASE("memory sizes", "[cli]") {
  CHECK(cli::parse_memory("1G") == (std::int64_t(1) << 30));
  CHECK(cli::parse_memory("512M") == (std::int64_t(512) << 20));
  CHECK(cli::parse_memory("1.5GiB") == (std::int64_t(3) << 29));
  CHECK(cli::parse_memory("1M") == (std::int64_t(1) << 20));
  CHECK_THROWS_AS(cli::parse_memory("4096"), UsageError);  // below 1 MiB: no block fits
  CHECK_THROWS_AS(cli::parse_memory("1K"), UsageError);
  CHECK_THROWS_AS(cli::parse_memory("lots"), UsageError);
  CHECK_THROWS_AS(cli::parse_memory("5Q"), UsageError);
  CHECK_THROWS_AS(cli::parse_memory("-1G"), UsageError);
}

TEST_CASE("a composite reaches the years whose slices hold it, however long the reach", "[engine][reach]") {
  const auto day = [](int y, int m, int d) { return double(days_from_civil(y, m, d)); };
  // 2022-11-15 with a reach of 60 days: 2022 and 2023 (its slice starts 2022-11-02).
  CHECK(years_reached(day(2022, 11, 15), 60) == std::vector<int>{2022, 2023});
  CHECK(years_reached(day(2022, 6, 15), 60) == std::vector<int>{2022});
  // The slice of year Y is [1 Jan Y - D, 1 Jan Y+1 + D): closed at its start, open at its end.
  CHECK(in_year_slice(2023, day(2023, 1, 1) - 30, 30));
  CHECK_FALSE(in_year_slice(2021, day(2022, 1, 1) + 30, 30));
  CHECK(years_reached(day(2022, 1, 30), 30) == std::vector<int>{2021, 2022});
  CHECK(years_reached(day(2022, 1, 31), 30) == std::vector<int>{2022});
  // Reaches of more than a year touch two years or more on either side (a spacetime fill
  // learns its seasons from several years): 2022-07-01 with 800 days reaches 2020 .. 2024.
  CHECK(years_reached(day(2022, 7, 1), 800) == std::vector<int>{2020, 2021, 2022, 2023, 2024});
  // Every year listed holds the day, and the years just outside do not.
  for (double reach : {16.0, 183.0, 365.0, 366.0, 730.0, 1200.0})
    for (double d = day(2019, 1, 1); d < day(2025, 1, 1); d += 13) {
      const auto years = years_reached(d, reach);
      REQUIRE_FALSE(years.empty());
      for (int y : years) CHECK(in_year_slice(y, d, reach));
      CHECK_FALSE(in_year_slice(years.front() - 1, d, reach));
      CHECK_FALSE(in_year_slice(years.back() + 1, d, reach));
      for (std::size_t k = 1; k < years.size(); ++k) CHECK(years[k] == years[k - 1] + 1);
    }
}
