#include <catch2/catch.hpp>

#include <tbb/enumerable_thread_specific.h>

#include <atomic>
#include <set>
#include <vector>

#include "engine/block_runner.hpp"
#include "engine/parallel.hpp"
#include "kalends/block_plan.hpp"
#include "kalends/error.hpp"
#include "kalends/fill.hpp"
#include "kalends/time_grid.hpp"

using namespace kalends;

namespace {
// Every pixel lies in exactly one core; reads hold their core plus the halo, clipped.
void check_cover(const BlockPlan& plan, int width, int height, int halo) {
  std::vector<int> count(std::size_t(width) * height, 0);
  for (const Block& b : plan.blocks) {
    CHECK(b.core.x % plan.tile == 0);
    CHECK(b.core.y % plan.tile == 0);
    for (int y = b.core.y; y < b.core.y + b.core.height; ++y)
      for (int x = b.core.x; x < b.core.x + b.core.width; ++x) ++count[std::size_t(y) * width + x];
    CHECK(b.read.x == std::max(0, b.core.x - halo));
    CHECK(b.read.y == std::max(0, b.core.y - halo));
    CHECK(b.read.x + b.read.width == std::min(width, b.core.x + b.core.width + halo));
    CHECK(b.read.y + b.read.height == std::min(height, b.core.y + b.core.height + halo));
  }
  for (int c : count) REQUIRE(c == 1);
}
}  // namespace

TEST_CASE("blocks cover the raster once and respect the pixel budget", "[engine][blocks]") {
  for (auto [w, h, halo, budget] : std::vector<std::tuple<int, int, int, std::int64_t>>{
           {1000, 700, 0, 256 * 256}, {1000, 700, 0, 1000 * 512}, {1000, 700, 8, 300 * 300},
           {100, 100, 0, 1 << 20}, {2048, 2048, 0, 2048 * 768}, {513, 257, 16, 600 * 600}}) {
    INFO(w << "x" << h << " halo " << halo << " budget " << budget);
    const BlockPlan plan = BlockPlan::make(w, h, halo, budget);
    check_cover(plan, w, h, halo);
    for (const Block& b : plan.blocks) CHECK(b.read.pixels() <= budget);
  }
  // A roomy budget gives full-width strips; a tight one, single tiles.
  CHECK(BlockPlan::make(2048, 2048, 0, 2048 * 768).block_width == 2048);
  CHECK(BlockPlan::make(2048, 2048, 0, 2048 * 768).block_height == 768);
  CHECK(BlockPlan::make(2048, 2048, 0, 256 * 256).blocks.size() == 64);
  CHECK_THROWS_AS(BlockPlan::make(2048, 2048, 8, 256 * 256), UsageError);
  // The smallest plan: one tile and its halo, clipped to the raster.
  CHECK(BlockPlan::smallest_read_pixels(2048, 2048, 8) == 272 * 272);
  CHECK(BlockPlan::smallest_read_pixels(100, 300, 32) == 100 * 300);
  CHECK_NOTHROW(BlockPlan::make(2048, 2048, 8, BlockPlan::smallest_read_pixels(2048, 2048, 8)));
  CHECK_THROWS_AS(BlockPlan::make(2048, 2048, 8, BlockPlan::smallest_read_pixels(2048, 2048, 8) - 1),
                  UsageError);
  // The refusal names what one block reads, not a tile larger than the raster.
  CHECK_THROWS_WITH(BlockPlan::make(100, 300, 32, 100 * 300 - 1),
                    Catch::Matchers::Contains("it reads 100 x 300 px"));
  CHECK_THROWS_WITH(BlockPlan::make(2048, 2048, 8, 256 * 256), Catch::Matchers::Contains("it reads 272 x 272 px"));
}

TEST_CASE("blocks run at most `at_once` at a time, each once, with every thread", "[engine][blocks]") {
  const BlockPlan plan = BlockPlan::make(2048, 1024, 0, 256 * 256);
  REQUIRE(plan.blocks.size() == 32);
  for (int at_once : {0, 1, 2, 3}) {
    INFO("at_once " << at_once);
    std::atomic<int> running{0}, most{0};
    std::vector<std::atomic<int>> seen(plan.blocks.size());
    tbb::enumerable_thread_specific<int> workers;
    kalends::detail::run_blocks(
        plan, 3, workers,
        [&](const Block& b, int&) {
          const int now = ++running;
          int before = most.load();
          while (now > before && !most.compare_exchange_weak(before, now)) {
          }
          ++seen[std::size_t(b.index)];
          // Some work with a parallel loop inside, as a method's block has.
          std::atomic<long> sum{0};
          kalends::detail::parallel_each(20000, 100, [&](std::size_t k) { sum += long(k % 7); });
          CHECK(sum == 59997);
          --running;
        },
        at_once);
    for (const auto& n : seen) CHECK(n == 1);
    CHECK(most <= (at_once > 0 ? at_once : 3));
  }
}

TEST_CASE("time grid keeps true spacing and resolves composite-calendar collisions", "[engine][grid]") {
  auto day = [](int y, int m, int d) { return TimePoint::from_date({y, m, d}); };
  // MODIS 16-day: DOY 337, 353, then 1 January restarts after 13 days.
  const std::vector<TimePoint> times{day(2021, 12, 3), day(2021, 12, 19), day(2022, 1, 1),
                                     day(2022, 1, 17), day(2022, 3, 22)};
  const TimeGrid g = TimeGrid::build(times);
  CHECK(g.step_days == 16);
  CHECK(g.slot_of_date == std::vector<int>{0, 1, 2, 3, 7});  // a 64-day gap keeps its 4 slots
  CHECK(g.size == 8);
  CHECK(g.slot_days[2] == 29);   // true date kept for the slot
  CHECK(g.slot_days[5] == 80);   // empty slot on the grid
  CHECK_FALSE(g.from_smallest_spacing);
  // Two dates nearest the same slot: the later moves to the next slot (12 days from its time).
  const TimeGrid c = TimeGrid::build({day(2020, 1, 1), day(2020, 1, 17), day(2020, 1, 21), day(2020, 2, 6)});
  CHECK(c.step_days == 16);
  CHECK(c.slot_of_date == std::vector<int>{0, 1, 2, 3});
  CHECK(c.largest_shift_days == 12);
  CHECK_FALSE(c.from_smallest_spacing);
}

TEST_CASE("time grid of a composite calendar keeps its step over many years", "[engine][grid]") {
  // MODIS calendars restart on 1 January: 16-day composites on DOY 1, 17, ..., 353 and 8-day
  // ones on DOY 1, 9, ..., 361 (MOD13/MOD11 user guides, from memory). Over 20 years the dates
  // drift from the grid's nominal times by ~3 days a year, but the grid misstates no interval
  // by more than the restart's 3-4 days; 0.3.14's first measure had sent these to a 13- or
  // 5-day grid.
  for (const int step : {16, 8}) {
    std::vector<TimePoint> times;
    for (int year = 2001; year <= 2020; ++year)
      for (int doy = 1; doy <= 365; doy += step)
        times.push_back(TimePoint{TimePoint::from_date({year, 1, 1}).seconds + std::int64_t(doy - 1) * 86400});
    const TimeGrid g = TimeGrid::build(times);
    CHECK_FALSE(g.from_smallest_spacing);
    CHECK(g.step_days == step);
    CHECK(g.largest_shift_days <= 4);
    CHECK(g.size == int(times.size()));  // each composite its own slot, in sequence
    CHECK_FALSE(g.placed_by_intervals);  // nearest slots serve a whole calendar
  }
}

TEST_CASE("time grid of a composite calendar keeps its step with a composite missing", "[engine][grid]") {
  // The MODIS 8-day calendar of ten years (as above) without one composite of 2015: after a
  // few years' drift the next composite's nearest slot was the missing one's, the grid misstated
  // that interval by a step, and the record went onto a 5-day grid (a helper's nightly job: a
  // withdrawn composite redid every year and moved values years away).
  std::vector<TimePoint> times;
  for (int year = 2010; year <= 2019; ++year)
    for (int doy = 1; doy <= 365; doy += 8)
      if (!(year == 2015 && doy == 129))
        times.push_back(TimePoint{TimePoint::from_date({year, 1, 1}).seconds + std::int64_t(doy - 1) * 86400});
  const TimeGrid g = TimeGrid::build(times);
  CHECK_FALSE(g.from_smallest_spacing);
  CHECK(g.step_days == 8);
  CHECK(g.placed_by_intervals);
  CHECK(g.largest_shift_days <= 4);
  CHECK(g.size == int(times.size()) + 1);  // one empty slot, where the missing composite was
  // The empty slot lies midway between the dates beside it, and slot times increase.
  for (std::size_t i = 1; i < times.size(); ++i) {
    const int a = g.slot_of_date[i - 1], b = g.slot_of_date[i];
    CHECK(b - a == (i == 5 * 46 + 16 ? 2 : 1));
    if (b - a == 2) CHECK(g.slot_days[a + 1] == Approx((g.slot_days[a] + g.slot_days[b]) / 2));
  }
  for (int s = 1; s < g.size; ++s) CHECK(g.slot_days[s] > g.slot_days[s - 1]);
}

TEST_CASE("time grid of a calendar of fixed days of the month keeps its step", "[engine][grid]") {
  // Dekads (1st, 11th, 21st: 8-11 days apart), pentads (1st, 6th, ..., 26th: 3-6 days) and
  // semi-monthly dates (1st, 16th) over 10-30 years: their drift from the grid pushes an odd date
  // on by one slot, a whole step; the smallest-spacing rule had sent dekads to an 8-day grid
  // (456 slots for 360 dates), a fixed lambda then smoothing differently.
  const std::vector<std::pair<std::vector<int>, int>> calendars{
      {{1, 11, 21}, 10}, {{1, 6, 11, 16, 21, 26}, 5}, {{1, 16}, 15}};
  for (const auto& [days, step] : calendars)
    for (const int years : {10, 27, 30}) {
      std::vector<TimePoint> times;
      for (int year = 1990; year < 1990 + years; ++year)
        for (int month = 1; month <= 12; ++month)
          for (const int day : days) times.push_back(TimePoint::from_date({year, month, day}));
      const TimeGrid g = TimeGrid::build(times);
      INFO(days.size() << " days a month, " << years << " years");
      CHECK_FALSE(g.from_smallest_spacing);
      CHECK(g.fixed_days_of_month);
      CHECK(g.step_days == step);
      CHECK(g.largest_shift_days <= step + 1);
      // The span on the step, no finer (a 10-day grid runs 36.5 slots a year for 36 dekads).
      CHECK(g.size <= (times.back().seconds - times.front().seconds) / 86400 / step + 2);
    }
  // Five dates on five different days of the month are no such calendar (the mixed case below).
  // Monthly files on the 1st, then dekads: fixed days of the month too, but the monthly step
  // misstates the dekads by months. They take the finer grid, as any mixed stack.
  std::vector<TimePoint> mixed;
  for (int year = 2010; year <= 2016; ++year)
    for (int month = 1; month <= 12; ++month) mixed.push_back(TimePoint::from_date({year, month, 1}));
  for (int month = 1; month <= 12; ++month)
    for (const int day : {1, 11, 21}) mixed.push_back(TimePoint::from_date({2017, month, day}));
  const TimeGrid m = TimeGrid::build(mixed);
  CHECK_FALSE(m.fixed_days_of_month);
  CHECK(m.from_smallest_spacing);
  CHECK(m.step_days == 8);
}

TEST_CASE("time grid of mixed spacing steps the smallest spacing, within a bound on its size", "[engine][grid]") {
  auto day = [](int y, int m, int d) { return TimePoint::from_date({y, m, d}); };
  // Spacings 16, 9, 7, 16: on the 16-day median grid 2 February (day 32) would be pushed to
  // slot 3 (day 48), a whole step away; on the 7-day grid every date is within 3.5 days.
  const TimeGrid mixed = TimeGrid::build({day(2020, 1, 1), day(2020, 1, 17), day(2020, 1, 26),
                                          day(2020, 2, 2), day(2020, 2, 18)});
  CHECK(mixed.from_smallest_spacing);
  CHECK_FALSE(mixed.fixed_days_of_month);
  CHECK(mixed.median_spacing_days == 16);
  CHECK(mixed.step_days == 7);
  CHECK(mixed.slot_of_date == std::vector<int>{0, 2, 4, 5, 7});
  CHECK(mixed.largest_shift_days < 7);  // 16 -> 25 days is 9 days, two slots (14 days)
  CHECK(mixed.slot_days[4] == 25);  // the true day of 26 January is kept
  // Two scenes ten minutes apart in a 16-day stack: a 10-minute grid would need ~2300 slots per
  // date, so the median grid stays and the shift is reported.
  std::vector<TimePoint> times;
  for (int k = 0; k < 6; ++k) times.push_back(TimePoint{day(2020, 1, 1).seconds + k * 16 * 86400});
  times.insert(times.begin() + 3, TimePoint{times[2].seconds + 600});
  const TimeGrid scenes = TimeGrid::build(times);
  CHECK_FALSE(scenes.from_smallest_spacing);
  CHECK(scenes.step_days == 16);
  CHECK(scenes.largest_shift_days >= 16);
  CHECK(scenes.slot_of_date == std::vector<int>{0, 1, 2, 3, 4, 5, 6});  // each later date one slot on
  CHECK(scenes.size == 7);
}

TEST_CASE("blocks capped at one tile row are the same for a strip of tile rows and the whole raster",
          "[engine][blocks]") {
  // 300 x 300 px, halo 32: one block reading the whole raster fits the smallest budget (a tile
  // and its halo clipped to the raster is 300 x 300), so without the cap the plan takes all
  // rows in one block, and a cluster shard's first strip (rows 0-255) would not be that block.
  const std::int64_t smallest = BlockPlan::smallest_read_pixels(300, 300, 32);
  CHECK(smallest == 300 * 300);
  CHECK(BlockPlan::make(300, 300, 32, smallest).blocks.size() == 1);
  const BlockPlan whole = BlockPlan::make(300, 300, 32, smallest, 256, std::nullopt, 1);
  REQUIRE(whole.blocks.size() == 2);
  CHECK(whole.blocks[0].core == Window{0, 0, 300, 256});
  CHECK(whole.blocks[0].read == Window{0, 0, 300, 288});
  CHECK(whole.blocks[1].core == Window{0, 256, 300, 44});
  CHECK(whole.blocks[1].read == Window{0, 224, 300, 76});
  for (const Window& strip : {Window{0, 0, 300, 256}, Window{0, 256, 300, 44}}) {
    const BlockPlan part = BlockPlan::make(300, 300, 32, smallest, 256, strip, 1);
    REQUIRE(part.blocks.size() == 1);
    const Block& same = whole.blocks[strip.y == 0 ? 0 : 1];
    CHECK(part.blocks[0].core == same.core);
    CHECK(part.blocks[0].read == same.read);
  }
}

TEST_CASE("values a program using the library sets by hand are checked, not divided by", "[engine][blocks]") {
  // A library user fills the structs without the command line's checks: a block side of 0 and
  // an N-day period of 0 days had stopped the process (division by zero), unsorted dates had
  // made a time grid with a negative step, and a layer index past the stack read out of bounds.
  REQUIRE_THROWS_AS(BlockPlan::make(100, 100, 0, 1 << 20, 0), kalends::UsageError);
  REQUIRE_THROWS_AS(BlockPlan::make(100, 100, -40, 1 << 30, 64), kalends::UsageError);
  kalends::CalendarPeriod zero;
  zero.kind = kalends::CalendarPeriod::Kind::days;
  zero.days = 0;
  REQUIRE_THROWS_AS(zero.per_year(), kalends::UsageError);
  REQUIRE_THROWS_AS(zero.span_of_day(100), kalends::UsageError);
  zero.days = -7;
  REQUIRE_THROWS_AS(zero.span_of_day(100), kalends::UsageError);
  zero.days = 16;
  REQUIRE(zero.per_year() == 23);
  const auto day = [](int y, int m, int d) { return kalends::TimePoint::from_date({y, m, d}); };
  REQUIRE_THROWS_AS(kalends::TimeGrid::build({day(2020, 2, 1), day(2020, 1, 1)}), kalends::UsageError);
  REQUIRE_THROWS_AS(kalends::TimeGrid::build({day(2020, 1, 1), day(2020, 1, 1)}), kalends::UsageError);
}
