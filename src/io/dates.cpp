// Calendar arithmetic: H. Hinnant, "chrono-Compatible Low-Level Date Algorithms" (public
// domain), days_from_civil / civil_from_days.
#include <algorithm>
#include <cctype>
#include <charconv>
#include <vector>
#include <cmath>
#include <fmt/format.h>
#include <stdexcept>
#include <string>

#include "kalends/time.hpp"

namespace kalends {

std::int64_t days_from_civil(int year, int month, int day) {
  const std::int64_t y = std::int64_t(year) - (month <= 2);
  const std::int64_t era = (y >= 0 ? y : y - 399) / 400;
  const std::int64_t yoe = y - era * 400;
  const std::int64_t mp = (month + 9) % 12;
  const std::int64_t doy = (153 * mp + 2) / 5 + day - 1;
  const std::int64_t doe = yoe * 365 + yoe / 4 - yoe / 100 + doy;
  return era * 146097 + doe - 719468;
}

CivilDate civil_from_days(std::int64_t z) {
  z += 719468;
  const std::int64_t era = (z >= 0 ? z : z - 146096) / 146097;
  const std::int64_t doe = z - era * 146097;
  const std::int64_t yoe = (doe - doe / 1460 + doe / 36524 - doe / 146096) / 365;
  const std::int64_t doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
  const std::int64_t mp = (5 * doy + 2) / 153;
  const int day = int(doy - (153 * mp + 2) / 5 + 1);
  const int month = int(mp < 10 ? mp + 3 : mp - 9);
  const int year = int(yoe + era * 400 + (month <= 2));
  return {year, month, day};
}

bool is_leap_year(int year) { return (year % 4 == 0 && year % 100 != 0) || year % 400 == 0; }

int days_in_month(int year, int month) {
  static constexpr int days[] = {31, 28, 31, 30, 31, 30, 31, 31, 30, 31, 30, 31};
  return month == 2 && is_leap_year(year) ? 29 : days[month - 1];
}

bool is_valid_date(int year, int month, int day) {
  return year >= 1000 && year <= 9999 && month >= 1 && month <= 12 && day >= 1 &&
         day <= days_in_month(year, month);
}

int day_of_year(const CivilDate& d) {
  return int(days_from_civil(d.year, d.month, d.day) - days_from_civil(d.year, 1, 1)) + 1;
}

TimePoint TimePoint::from_date(const CivilDate& d) {
  return {days_from_civil(d.year, d.month, d.day) * 86400};
}

static std::int64_t floor_div(std::int64_t a, std::int64_t b) {
  return a / b - ((a % b != 0) && ((a < 0) != (b < 0)));
}

CivilDate TimePoint::date() const { return civil_from_days(floor_div(seconds, 86400)); }

bool TimePoint::is_midnight() const { return seconds - floor_div(seconds, 86400) * 86400 == 0; }

std::string TimePoint::label() const {
  const CivilDate d = date();
  char text[32];
  if (is_midnight()) {
    std::snprintf(text, sizeof text, "%04d-%02d-%02d", d.year, d.month, d.day);
  } else {
    const std::int64_t s = seconds - floor_div(seconds, 86400) * 86400;
    std::snprintf(text, sizeof text, "%04d-%02d-%02dT%02d%02d", d.year, d.month, d.day,
                  int(s / 3600), int(s / 60 % 60));
  }
  return text;
}

std::string TimePoint::iso() const {
  const CivilDate d = date();
  const std::int64_t s = seconds - floor_div(seconds, 86400) * 86400;
  char text[32];
  std::snprintf(text, sizeof text, "%04d-%02d-%02dT%02d:%02d:%02dZ", d.year, d.month, d.day,
                int(s / 3600), int(s / 60 % 60), int(s % 60));
  return text;
}

namespace {

int digits_to_int(std::string_view s) {
  int v = 0;
  // Too many digits for an int: -1, which no range check passes (it had been 0: 99999999999
  // hours read as midnight).
  if (std::from_chars(s.data(), s.data() + s.size(), v).ec != std::errc()) return -1;
  return v;
}

std::optional<TimePoint> date_from_digits(std::string_view run) {
  if (run.size() == 8) {  // YYYYMMDD
    const int y = digits_to_int(run.substr(0, 4)), m = digits_to_int(run.substr(4, 2)),
              d = digits_to_int(run.substr(6, 2));
    if (is_valid_date(y, m, d)) return TimePoint::from_date({y, m, d});
  } else if (run.size() == 7) {  // YYYYDDD
    const int y = digits_to_int(run.substr(0, 4)), doy = digits_to_int(run.substr(4, 3));
    if (y >= 1000 && doy >= 1 && doy <= (is_leap_year(y) ? 366 : 365))
      return TimePoint{(days_from_civil(y, 1, 1) + doy - 1) * 86400};
  }
  return std::nullopt;
}

bool is_digit(char c) { return std::isdigit(static_cast<unsigned char>(c)) != 0; }

// The runs of digits in a name, each with where it starts.
std::vector<std::pair<std::size_t, std::string_view>> digit_runs(std::string_view name) {
  std::vector<std::pair<std::size_t, std::string_view>> runs;
  for (std::size_t i = 0; i < name.size();) {
    if (!is_digit(name[i])) {
      ++i;
      continue;
    }
    std::size_t j = i;
    while (j < name.size() && is_digit(name[j])) ++j;
    runs.emplace_back(i, name.substr(i, j - i));
    i = j;
  }
  return runs;
}

}  // namespace

std::optional<TimePoint> date_from_name(std::string_view name) {
  if (auto found = find_date_in_name(name)) return found->time;
  return std::nullopt;
}

std::optional<DateInName> find_date_in_name(std::string_view name) {
  // Only the last path component: folder names often carry other numbers.
  if (const auto slash = name.find_last_of('/'); slash != std::string_view::npos)
    name = name.substr(slash + 1);
  for (const auto& [i, run] : digit_runs(name)) {
    const std::size_t j = i + run.size();
    // YYYY-MM-DD: a run of 4, '-', 2 digits, '-', 2 digits, then no further digit.
    if (run.size() == 4 && j + 6 <= name.size() && name[j] == '-' && is_digit(name[j + 1]) &&
        is_digit(name[j + 2]) && name[j + 3] == '-' && is_digit(name[j + 4]) &&
        is_digit(name[j + 5]) && (j + 6 == name.size() || !is_digit(name[j + 6]))) {
      const int y = digits_to_int(run), m = digits_to_int(name.substr(j + 1, 2)),
                d = digits_to_int(name.substr(j + 4, 2));
      if (is_valid_date(y, m, d)) {
        DateInName found{TimePoint::from_date({y, m, d}), i, 10};
        // A time of day as kalends labels sub-daily outputs: "THHMM", then no further digit.
        const std::size_t t = j + 6;
        if (t + 5 <= name.size() && name[t] == 'T' && is_digit(name[t + 1]) && is_digit(name[t + 2]) &&
            is_digit(name[t + 3]) && is_digit(name[t + 4]) && (t + 5 == name.size() || !is_digit(name[t + 5]))) {
          const int hours = digits_to_int(name.substr(t + 1, 2)), minutes = digits_to_int(name.substr(t + 3, 2));
          if (hours < 24 && minutes < 60) {
            found.time.seconds += hours * 3600 + minutes * 60;
            found.length = 15;
          }
        }
        return found;
      }
    }
    if (auto t = date_from_digits(run)) return DateInName{*t, i, run.size()};
  }
  return std::nullopt;
}

std::optional<std::string> impossible_date_in_name(std::string_view name) {
  if (const auto slash = name.find_last_of('/'); slash != std::string_view::npos) name = name.substr(slash + 1);
  for (std::size_t i = 0; i + 10 <= name.size(); ++i) {
    const std::string_view t = name.substr(i, 10);
    const bool shape = t[4] == '-' && t[7] == '-' &&
                       std::all_of(t.begin(), t.end(), [](char c) { return c == '-' || is_digit(c); }) &&
                       (i == 0 || !is_digit(name[i - 1])) && (i + 10 == name.size() || !is_digit(name[i + 10]));
    if (shape && !is_valid_date(digits_to_int(t.substr(0, 4)), digits_to_int(t.substr(5, 2)),
                                digits_to_int(t.substr(8, 2))))
      return std::string(t);
  }
  // YYYYMMDD and YYYYDDD runs of a plausible year whose day does not exist (20200230, 2019366,
  // 2020000) had been "no date in the file name". Other numbers (versions, tile ids) are left.
  for (const auto& [at, run] : digit_runs(name)) {
    if (run.size() != 7 && run.size() != 8) continue;
    const int year = digits_to_int(run.substr(0, 4));
    if (year < 1900 || year > 2100) continue;
    if (run.size() == 8) {
      const int month = digits_to_int(run.substr(4, 2)), day = digits_to_int(run.substr(6, 2));
      if (month >= 1 && month <= 12 && day <= 31 && !is_valid_date(year, month, day)) return std::string(run);
    } else {
      const int day = digits_to_int(run.substr(4, 3));
      if (day == 0 || (day == 366 && !is_leap_year(year))) return std::string(run);
    }
  }
  return std::nullopt;
}

std::optional<TimePoint> parse_iso_time(std::string_view text) {
  while (!text.empty() && std::isspace(static_cast<unsigned char>(text.front())))
    text.remove_prefix(1);
  while (!text.empty() && std::isspace(static_cast<unsigned char>(text.back())))
    text.remove_suffix(1);
  auto number = [&](std::size_t pos, std::size_t len, int& out) {
    if (pos + len > text.size()) return false;
    for (std::size_t k = pos; k < pos + len; ++k)
      if (!is_digit(text[k])) return false;
    out = digits_to_int(text.substr(pos, len));
    return true;
  };
  int y, m, d;
  // Years may be written with fewer digits in CF units ("1-1-1"); accept 1 to 4.
  std::size_t p = 0;
  while (p < text.size() && is_digit(text[p])) ++p;
  if (p == 0 || p > 4 || !number(0, p, y)) return std::nullopt;
  std::size_t q = p + 1;
  if (p >= text.size() || text[p] != '-') return std::nullopt;
  std::size_t e = q;
  while (e < text.size() && is_digit(text[e])) ++e;
  if (e == q || e - q > 2 || !number(q, e - q, m)) return std::nullopt;
  if (e >= text.size() || text[e] != '-') return std::nullopt;
  q = e + 1;
  e = q;
  while (e < text.size() && is_digit(text[e])) ++e;
  if (e == q || e - q > 2 || !number(q, e - q, d)) return std::nullopt;
  if (m < 1 || m > 12 || d < 1 || d > days_in_month(y, m)) return std::nullopt;
  std::int64_t seconds = days_from_civil(y, m, d) * 86400;
  if (e < text.size()) {
    if (text[e] != 'T' && text[e] != ' ') return std::nullopt;
    std::string_view rest = text.substr(e + 1);
    int hh = 0, mm = 0, ss = 0;
    std::size_t h = 0;
    while (h < rest.size() && is_digit(rest[h])) ++h;
    if (h == 0 || h > 2) return std::nullopt;
    hh = digits_to_int(rest.substr(0, h));
    if (h < rest.size() && rest[h] == ':') {
      std::size_t k = h + 1, k2 = k;
      while (k2 < rest.size() && is_digit(rest[k2])) ++k2;
      if (k2 == k) return std::nullopt;
      mm = digits_to_int(rest.substr(k, k2 - k));
      if (k2 < rest.size() && rest[k2] == ':') {
        std::size_t s1 = k2 + 1, s2 = s1;
        while (s2 < rest.size() && (is_digit(rest[s2]) || rest[s2] == '.')) ++s2;
        // Only a number of seconds a minute can hold: "…:99999999999" had overflowed the int
        // (a silent date 68 years off), and "…:." ended in "stod".
        const std::string field(rest.substr(s1, s2 - s1));
        char* end = nullptr;
        const double seconds = std::strtod(field.c_str(), &end);
        if (field.empty() || end != field.c_str() + field.size() || !(seconds >= 0 && seconds < 61)) return std::nullopt;
        ss = int(std::floor(seconds));
        k2 = s2;
      }
      rest = rest.substr(k2);
    } else {
      rest = rest.substr(h);
    }
    if (!(rest.empty() || rest == "Z" || rest == "UTC" || rest == " UTC" || rest == "+00:00" ||
          rest == " +00:00"))
      return std::nullopt;
    if (hh > 23 || mm > 59 || ss > 60) return std::nullopt;
    seconds += hh * 3600 + mm * 60 + ss;
  }
  return TimePoint{seconds};
}

namespace {

// Julian-calendar day number minus the Gregorian one for the same written date (the two day-
// number formulas of the Julian and Gregorian calendars differ by -38 + Y/100 - Y/400, Y the
// year counted from March of -4800; Meeus 1998, Astronomical Algorithms, ch. 7, from memory).
// For 0001-01-01 it is -2: Julian day 1721424 against 1721426.
std::int64_t julian_minus_gregorian_days(int y, int m) {
  const int a = (14 - m) / 12;
  const std::int64_t shifted = std::int64_t(y) + 4800 - a;
  return -38 + shifted / 100 - shifted / 400;
}

// Cuts a trailing time zone off a CF (UDUNITS) units' origin: " -06:00", " +0530", " -6",
// "T00:00-06:00", " GMT", "UTC", "Z". The times are kept on that zone's clock (cf_time), so only
// its form is checked: what is not a zone is left for the date parser to refuse.
// Returns the zone's offset from UTC in seconds (0 for none, UTC, GMT, Z).
int cut_zone(std::string_view& origin) {
  for (std::string_view name : {" GMT", "GMT", " UTC", "UTC", "Z"}) {
    if (origin.size() < name.size() + 5) continue;
    const std::string_view tail = origin.substr(origin.size() - name.size());
    if (std::equal(tail.begin(), tail.end(), name.begin(), name.end(),
                   [](char a, char b) { return std::toupper(static_cast<unsigned char>(a)) == b; })) {
      origin.remove_suffix(name.size());
      return 0;
    }
  }
  // "2001-01-01T00:00:00-06:00": the offset follows the time without a space (ISO 8601).
  auto space = origin.find_last_of(' ');
  if (const auto t = origin.find('T', 10); t != std::string_view::npos) {
    const auto sign = origin.find_last_of("+-");
    if (sign != std::string_view::npos && sign > t) space = sign - 1;
  }
  if (space == std::string_view::npos) return 0;
  std::string_view zone = origin.substr(space + 1);
  if (zone.size() < 2 || (zone[0] != '+' && zone[0] != '-')) return 0;
  const int sign = zone[0] == '-' ? -1 : 1;
  zone.remove_prefix(1);
  int hours = 0, minutes = 0;
  const auto colon = zone.find(':');
  auto digits = [](std::string_view d, int& out) {
    if (d.empty() || d.size() > 2) return false;
    for (char c : d)
      if (c < '0' || c > '9') return false;
    out = digits_to_int(d);
    return true;
  };
  if (colon != std::string_view::npos) {
    if (!digits(zone.substr(0, colon), hours) || !digits(zone.substr(colon + 1), minutes)) return 0;
  } else if (zone.size() == 4) {
    if (!digits(zone.substr(0, 2), hours) || !digits(zone.substr(2), minutes)) return 0;
  } else if (!digits(zone, hours)) {
    return 0;
  }
  if (hours > 14 || minutes > 59) return 0;
  origin = origin.substr(0, origin[space] == ' ' ? space : space + 1);
  return sign * (hours * 3600 + minutes * 60);
}

// Where " since " stands in CF time units, in any case: UDUNITS reads units so ("HOURS SINCE
// ..."; from memory).
std::size_t since_in(std::string_view units) {
  std::string lower(units);
  for (char& c : lower) c = char(std::tolower(static_cast<unsigned char>(c)));
  return lower.find(" since ");
}

// The origin after " since ", trailing blanks cut.
std::string_view origin_after(std::string_view units, std::size_t since) {
  std::string_view origin = units.substr(since + 7);
  while (!origin.empty() && origin.back() == ' ') origin.remove_suffix(1);
  return origin;
}

}  // namespace

int cf_zone_offset_seconds(std::string_view units) {
  const std::size_t since = since_in(units);
  if (since == std::string::npos) return 0;
  std::string_view origin = origin_after(units, since);
  return cut_zone(origin);
}

TimePoint cf_time(double value, std::string_view units, std::string_view calendar_name) {
  std::string calendar(calendar_name);
  for (char& c : calendar) c = char(std::tolower(static_cast<unsigned char>(c)));
  // "gregorian " as some writers leave it (blanks, tabs, line ends).
  while (!calendar.empty() && std::isspace(static_cast<unsigned char>(calendar.back()))) calendar.pop_back();
  while (!calendar.empty() && std::isspace(static_cast<unsigned char>(calendar.front()))) calendar.erase(calendar.begin());
  const bool mixed = calendar.empty() || calendar == "standard" || calendar == "gregorian";
  if (!mixed && calendar != "proleptic_gregorian")
    throw std::invalid_argument("calendar '" + std::string(calendar_name) +
                                "' is not supported (standard, gregorian, proleptic_gregorian): its days are not "
                                "the civil calendar's that survey dates are written in; give each date a file "
                                "named with its date (the name's date is read first), or convert the time axis "
                                "to the standard calendar");
  const std::size_t since = since_in(units);
  if (since == std::string::npos)
    throw std::invalid_argument("time units '" + std::string(units) + "' lack 'since'");
  std::string unit(units.substr(0, since));
  for (char& c : unit) c = char(std::tolower(static_cast<unsigned char>(c)));
  double seconds_per_unit;
  if (unit == "days" || unit == "day" || unit == "d")
    seconds_per_unit = 86400;
  else if (unit == "hours" || unit == "hour" || unit == "h" || unit == "hr")
    seconds_per_unit = 3600;
  else if (unit == "minutes" || unit == "minute" || unit == "min")
    seconds_per_unit = 60;
  else if (unit == "seconds" || unit == "second" || unit == "s" || unit == "sec")
    seconds_per_unit = 1;
  else
    throw std::invalid_argument("time unit '" + unit +
                                "' is not supported (days, hours, minutes or seconds; months and years are not fixed "
                                "lengths of time)");
  std::string_view origin_text = origin_after(units, since);
  // "days since 2001-01-01 00:00:00 -06:00": the time on the zone's own clock. A daily or
  // monthly stamp at local midnight keeps its day so (at +05:00 it had become the day before,
  // and each month's value the month before's); the reader moves an axis with times of day to
  // UTC (cf_zone_offset_seconds).
  cut_zone(origin_text);
  const auto origin = parse_iso_time(origin_text);
  if (!origin) throw std::invalid_argument("time origin in '" + std::string(units) + "' unreadable");
  std::int64_t origin_seconds = origin->seconds;
  // The standard (mixed) calendar is Julian before 1582-10-15 (CF conventions, section 4.4.1):
  // an origin such as "hours since 1-1-1" is a Julian date, two days before the proleptic
  // Gregorian one of the same name.
  const std::int64_t reform = days_from_civil(1582, 10, 15) * 86400;
  if (mixed && origin->seconds < reform) {
    const CivilDate d = origin->date();
    if (origin->seconds >= days_from_civil(1582, 10, 5) * 86400)
      throw std::invalid_argument("time origin in '" + std::string(units) +
                                  "' is one of the days the standard calendar skips (1582-10-05 to 14)");
    origin_seconds += julian_minus_gregorian_days(d.year, d.month) * 86400;
  }
  // NaN, or a variable's fill value (9.97e36 for doubles: a record never written): no date. A
  // cast of either had overflowed (undefined) and named a date 292 billion years off.
  constexpr double longest_offset_seconds = 1e15;  // about 32 million years
  if (!(std::abs(value * seconds_per_unit) < longest_offset_seconds))
    throw std::invalid_argument(fmt::format("time value {:g} is no date (NaN, or the variable's fill value: a record "
                                            "never written?)",
                                            value));
  const TimePoint t{origin_seconds + std::int64_t(std::llround(value * seconds_per_unit))};
  if (mixed && t.seconds < reform)
    throw std::invalid_argument("a time before 1582-10-15 in the standard calendar (Julian there) is not supported");
  return t;
}

}  // namespace kalends
