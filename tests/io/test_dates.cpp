#include <catch2/catch.hpp>

#include "kalends/time.hpp"

using namespace kalends;

TEST_CASE("civil date round trip and known day numbers", "[io][dates]") {
  // 1970-01-01 is day 0; 2000-03-01 is day 11017 (checkable with `date -d 2000-03-01 +%s` / 86400).
  CHECK(days_from_civil(1970, 1, 1) == 0);
  CHECK(days_from_civil(2000, 3, 1) == 11017);
  CHECK(days_from_civil(1950, 1, 1) == -7305);
  for (std::int64_t d = -800000; d < 800000; d += 997) {
    const CivilDate c = civil_from_days(d);
    CHECK(days_from_civil(c.year, c.month, c.day) == d);
  }
  CHECK(is_leap_year(2000));
  CHECK_FALSE(is_leap_year(1900));
  CHECK(day_of_year({2004, 12, 31}) == 366);
  CHECK(day_of_year({2005, 3, 1}) == 60);
}

TEST_CASE("dates in file names", "[io][dates]") {
  struct Row {
    const char* name;
    const char* expected;  // label, or "" for none
  };
  // Table: input, expected date.
  const Row rows[] = {
      {"ndvi_2004-05-24.tif", "2004-05-24"},
      {"ndvi_20040524.tif", "2004-05-24"},
      {"MOD13A1.A2004145.h12v04.006.2015154134511.hdf", "2004-05-24"},  // DOY 145 of a leap year
      {"lst_2005001.tif", "2005-01-01"},
      {"A2004366.tif", "2004-12-31"},
      {"A2005366.tif", ""},          // 2005 has 365 days
      {"ndvi_2004-13-01.tif", ""},   // month 13
      {"ndvi_20040230.tif", ""},     // 30 February
      {"/data/2020-01-01/ndvi_v6.tif", ""},  // folders are not searched
      {"ndvi.tif", ""},
      {"x_12345678901_2004-02-29.tif", "2004-02-29"},  // long digit runs are skipped
      // Sub-daily outputs are labelled with the time of day (TimePoint::label); read back as
      // such, not as midnight, where 24 hours of one day had been 'duplicate dates'.
      {"t2m_2019-03-01T0100.tif", "2019-03-01T0100"},
      {"t2m_2019-03-01T2330.tif", "2019-03-01T2330"},
      {"t2m_2019-03-01T2500.tif", "2019-03-01"},        // no hour 25: the date alone
      {"t2m_2019-03-01T01000.tif", "2019-03-01"},       // five digits: not a time
  };
  for (const Row& row : rows) {
    INFO(row.name);
    const auto t = date_from_name(row.name);
    if (*row.expected == '\0') {
      CHECK_FALSE(t.has_value());
    } else {
      REQUIRE(t.has_value());
      CHECK(t->label() == row.expected);
    }
  }
}

TEST_CASE("a YYYY-MM-DD in a name that is no calendar date is found for the error", "[io][dates]") {
  CHECK(impossible_date_in_name("ndvi_2004-02-30.tif") == "2004-02-30");
  CHECK(impossible_date_in_name("/data/x/ndvi_2005-13-01_v2.tif") == "2005-13-01");
  CHECK_FALSE(impossible_date_in_name("ndvi_2004-02-29.tif"));      // a leap day
  CHECK_FALSE(impossible_date_in_name("/data/2004-02-30/ndvi.tif"));  // folders are not searched
  CHECK_FALSE(impossible_date_in_name("ndvi_12004-02-30.tif"));     // part of a longer number
  CHECK_FALSE(impossible_date_in_name("ndvi.tif"));
  // Day-of-year and YYYYMMDD runs of a plausible year whose day does not exist.
  CHECK(impossible_date_in_name("x_2019366.tif") == "2019366");  // 2019 is no leap year
  CHECK(impossible_date_in_name("MOD13Q1.A2020000.h21v08.tif") == "2020000");
  CHECK(impossible_date_in_name("x_20200230.tif") == "20200230");
  CHECK(impossible_date_in_name("x_20190229.tif") == "20190229");
  CHECK_FALSE(impossible_date_in_name("x_2020366.tif"));          // day 366 of a leap year
  CHECK_FALSE(impossible_date_in_name("r1234567_v2.tif"));        // a version, no plausible year
  CHECK_FALSE(impossible_date_in_name("tile_20201340.tif"));      // month 13: not a date's shape
  CHECK_FALSE(impossible_date_in_name("x_2019400.tif"));          // day 400: another number
}

TEST_CASE("ISO and CF times", "[io][dates]") {
  REQUIRE(parse_iso_time("1950-01-01 00:00:00"));
  CHECK(parse_iso_time("2019-03-01T06:30:00Z")->label() == "2019-03-01T0630");
  CHECK_FALSE(parse_iso_time("2019-02-30"));
  CHECK_FALSE(parse_iso_time("yesterday"));
  // bcsd_obs_1999.nc's first time value; (date(1999,1,31) - date(1950,1,1)).days == 17927 by
  // Python's datetime.
  CHECK(cf_time(17927, "days since 1950-01-01 00:00:00").label() == "1999-01-31");
  CHECK(cf_time(36, "hours since 2000-01-01").label() == "2000-01-02T1200");
  CHECK(cf_time(90, "minutes since 2000-01-01 00:00").label() == "2000-01-01T0130");
  CHECK_THROWS_AS(cf_time(1, "days since 2000-01-01", "360_day"), std::invalid_argument);
  CHECK_THROWS_AS(cf_time(1, "fortnights since 2000-01-01"), std::invalid_argument);
  // The units that are read are named (the message had named only the refused one).
  CHECK_THROWS_WITH(cf_time(1, "months since 2000-01-01"), Catch::Contains("days, hours, minutes or seconds"));
  CHECK_THROWS_AS(cf_time(1, "days"), std::invalid_argument);
}

TEST_CASE("the standard calendar is Julian before 1582-10-15; zones and capitals", "[io][dates]") {
  // CF conventions 4.4.1: "standard" and "gregorian" are the mixed Julian/Gregorian calendar.
  // Julian 0001-01-01 is Julian day 1721424, Gregorian 0001-01-01 is 1721426 (Meeus,
  // Astronomical Algorithms, ch. 7, from memory): an origin of "1-1-1" in the standard calendar
  // lies two days before the proleptic Gregorian one. 730485 = date(2001,1,1).toordinal() - 1
  // in Python (proleptic Gregorian days since 0001-01-01); 2 more days from the Julian origin.
  const double hours = (730485 + 2) * 24.0;
  CHECK(cf_time(hours, "hours since 1-1-1 00:00:0.0", "standard").label() == "2001-01-01");
  CHECK(cf_time(hours, "hours since 1-1-1 00:00:0.0", "gregorian").label() == "2001-01-01");
  CHECK(cf_time(hours, "hours since 1-1-1 00:00:0.0", "").label() == "2001-01-01");
  CHECK(cf_time(hours, "hours since 1-1-1 00:00:0.0", "proleptic_gregorian").label() == "2001-01-03");
  // Origins after the reform are the same in both.
  CHECK(cf_time(1, "days since 1582-10-15", "standard").label() == "1582-10-16");
  // Julian 1582-10-04 was followed by Gregorian 1582-10-15.
  CHECK(cf_time(1, "days since 1582-10-04", "standard").label() == "1582-10-15");
  CHECK_THROWS_AS(cf_time(0, "days since 1582-10-10", "standard"), std::invalid_argument);
  CHECK_THROWS_AS(cf_time(0, "days since 1500-01-01", "standard"), std::invalid_argument);
  // Calendar names in any case (CF attribute values are case-insensitive in practice; from memory).
  CHECK(cf_time(17927, "days since 1950-01-01", "Gregorian").label() == "1999-01-31");
  CHECK(cf_time(17927, "days since 1950-01-01", "PROLEPTIC_GREGORIAN").label() == "1999-01-31");
  // A UDUNITS origin with a time-zone offset: read, and the times kept on that zone's clock (a
  // daily stamp at local midnight keeps its day; at +05:00 UTC would make it the day before).
  CHECK(cf_time(0, "days since 2001-01-01 00:00:00 -06:00").label() == "2001-01-01");
  CHECK(cf_time(0, "days since 2000-01-01 00:00:00 +05:00").label() == "2000-01-01");
  CHECK(cf_time(0, "hours since 2001-01-01 12:00 +0530").label() == "2001-01-01T1200");
  CHECK(cf_time(1, "days since 2001-01-01 00:00:00 +00:00").label() == "2001-01-02");
  // ISO 8601's offset right after the time, GMT, and units in capitals (UDUNITS; from memory).
  CHECK(cf_time(0, "hours since 2001-01-01T00:00:00-06:00").label() == "2001-01-01");
  CHECK(cf_time(2, "hours since 2001-01-01T12:00+05:30").label() == "2001-01-01T1400");
  CHECK(cf_time(1, "days since 2001-01-01 00:00:00 GMT").label() == "2001-01-02");
  CHECK(cf_time(1, "days since 2000-01-01 00:00:00 utc").label() == "2000-01-02");
  CHECK(cf_time(1, "days since 2000-1-1 GMT").label() == "2000-01-02");
  CHECK(cf_time(1, "days since 2000-01-01Z").label() == "2000-01-02");
  CHECK(cf_time(36, "HOURS SINCE 2000-01-01").label() == "2000-01-02T1200");
  CHECK(cf_time(1, "Days Since 2000-01-01T00:00:00").label() == "2000-01-02");
  // A calendar name with blanks around it, as some writers leave it.
  CHECK(cf_time(1, "days since 2000-01-01", "gregorian ").label() == "2000-01-02");
  CHECK(cf_time(1, "days since 2000-01-01", "\tstandard\n").label() == "2000-01-02");
  // The zone's offset, for an axis with times of day, which is moved to UTC.
  CHECK(cf_zone_offset_seconds("hours since 2019-03-01 00:00:00 -06:00") == -6 * 3600);
  CHECK(cf_zone_offset_seconds("hours since 2001-01-01 12:00 +0530") == 5 * 3600 + 30 * 60);
  CHECK(cf_zone_offset_seconds("hours since 2001-01-01T12:00+05:30") == 5 * 3600 + 30 * 60);
  CHECK(cf_zone_offset_seconds("days since 2001-01-01 00:00:00 GMT") == 0);
  CHECK(cf_zone_offset_seconds("days since 2001-01-01") == 0);
}
