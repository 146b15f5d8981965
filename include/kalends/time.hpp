// Calendar arithmetic and the date conventions found in raster stacks (file names, CF time
// axes, GRIB valid times). Proleptic Gregorian calendar, UTC.
#pragma once

#include <cstdint>
#include <optional>
#include <string>
#include <string_view>

namespace kalends {

struct CivilDate {
  int year = 1970;
  int month = 1;  // 1..12
  int day = 1;    // 1..31
  auto operator<=>(const CivilDate&) const = default;
};

/// Days since 1970-01-01 of a proleptic Gregorian date (Hinnant's algorithm).
std::int64_t days_from_civil(int year, int month, int day);
CivilDate civil_from_days(std::int64_t days);
bool is_valid_date(int year, int month, int day);
bool is_leap_year(int year);
int days_in_month(int year, int month);
int day_of_year(const CivilDate& date);  // 1..366

/// A moment in UTC, to the second.
struct TimePoint {
  std::int64_t seconds = 0;  // since 1970-01-01T00:00:00Z

  static TimePoint from_date(const CivilDate& date);
  double days() const { return static_cast<double>(seconds) / 86400.0; }
  CivilDate date() const;
  bool is_midnight() const;
  /// "YYYY-MM-DD", or "YYYY-MM-DDTHHMM" where the time of day is not midnight.
  std::string label() const;
  std::string iso() const;  // "YYYY-MM-DDTHH:MM:SSZ"
  auto operator<=>(const TimePoint&) const = default;
};

/// Finds a date in a file name: YYYY-MM-DD (with the time of day where "THHMM" follows, as
/// TimePoint::label writes it), YYYYMMDD, or year and day of year YYYYDDD (also after a letter,
/// as in "A2004145"). The first valid date wins. Digit runs of other lengths
/// (versions, production time stamps) are ignored.
std::optional<TimePoint> date_from_name(std::string_view name);

/// The same, with where the date stands in the last path component.
struct DateInName {
  TimePoint time;
  std::size_t position = 0, length = 0;
};
std::optional<DateInName> find_date_in_name(std::string_view name);
/// A YYYY-MM-DD, YYYYMMDD or YYYYDDD in a file name that is no calendar date ("2004-02-30",
/// "20200230", "2019366"), for the error that
/// would otherwise say the name has no date.
std::optional<std::string> impossible_date_in_name(std::string_view name);

/// Parses "YYYY-MM-DD" optionally followed by "[T ]hh:mm[:ss][Z]".
std::optional<TimePoint> parse_iso_time(std::string_view text);

/// A CF-conventions time value: `value` in `units` ("days since 1950-01-01 00:00:00"; an
/// origin's time-zone offset, " -06:00", is read and the time returned on that zone's clock: the
/// caller moves an axis with times of day to UTC by cf_zone_offset_seconds). Only the standard
/// (gregorian) and proleptic_gregorian calendars are accepted, in any case; the standard one is
/// Julian before 1582-10-15, so an earlier origin is a Julian date and an earlier time is
/// refused. Throws std::invalid_argument with the reason otherwise.
TimePoint cf_time(double value, std::string_view units, std::string_view calendar = "standard");

/// The offset from UTC, in seconds, of a CF time origin's zone ("hours since 2019-03-01 00:00
/// -06:00": -21600); 0 where it names none or UTC.
int cf_zone_offset_seconds(std::string_view units);

}  // namespace kalends
