// Mechanics of the thermal kernels. Published values are checked here where they are simple
// arithmetic on the published coefficients; the full numpy comparisons live in
// tests/reference/test_thermal_numpy.py.
#include <unistd.h>

#include <catch2/catch.hpp>
#include <cmath>
#include <cstdio>
#include <fstream>

#include "kalends/error.hpp"
#include "kalends/thermal.hpp"

using namespace kalends;

namespace {
std::string temp_file(const std::string& text) {
  char name[] = "/tmp/kalends-thermal-XXXXXX";
  const int fd = mkstemp(name);
  REQUIRE(fd >= 0);
  close(fd);
  std::ofstream(name) << text;
  return name;
}
}  // namespace

TEST_CASE("day length: 12 h at the equator and at the equinox, long summer days at 50 N",
          "[thermal][sun]") {
  for (int doy : {1, 100, 172, 300})
    CHECK(sun_times(0.0, doy).day_length == Approx(12.0).margin(1e-12));
  // Cooper's declination is 0 on day 81 (284 + 81 = 365).
  for (double lat : {-60.0, -20.0, 35.0, 65.0})
    CHECK(sun_times(lat, 81).day_length == Approx(12.0).margin(1e-9));
  // Geometric day length at 50 N on the June solstice is about 16.2 h (astronomical tables,
  // from memory; about 16.4 h with refraction, which we leave out).
  const SunTimes june = sun_times(50.0, 172);
  CHECK(june.day_length > 16.0);
  CHECK(june.day_length < 16.3);
  CHECK(june.sunrise + june.sunset == Approx(24.0));  // symmetric about solar noon
  CHECK(sun_times(-50.0, 172).day_length == Approx(24.0 - june.day_length));
  // Polar day and night are held inside 1..23 h.
  CHECK(sun_times(80.0, 172).day_length == 23.0);
  CHECK(sun_times(80.0, 355).day_length == 1.0);
}

TEST_CASE("Parton-Logan curve: minimum at sunrise + c, maximum Tmax at noon + a + c, continuous",
          "[thermal][diurnal]") {
  const DiurnalParameters p;  // a = 1.86, b = 2.20, c = -0.17 (Parton & Logan 1981, Table 1)
  const SunTimes sun = sun_times(10.0, 120);
  const DiurnalDay yesterday{8, 24, sun}, today{10, 30, sun}, tomorrow{12, 28, sun};
  const double tn = sun.sunrise + p.c;
  CHECK(diurnal_temperature(p, yesterday, today, tomorrow, tn) == Approx(10.0));
  CHECK(diurnal_temperature(p, yesterday, today, tomorrow, 12 + p.a + p.c) == Approx(30.0));
  // Continuity at dawn (night toward today's minimum, normalised to end there) and at sunset.
  CHECK(diurnal_temperature(p, yesterday, today, tomorrow, tn - 1e-7) == Approx(10.0).margin(1e-5));
  const double at_sunset = diurnal_temperature(p, yesterday, today, tomorrow, sun.sunset);
  CHECK(diurnal_temperature(p, yesterday, today, tomorrow, sun.sunset + 1e-7) ==
        Approx(at_sunset).margin(1e-5));
  // Midnight of today's end equals midnight of tomorrow's start.
  const double end_of_day = diurnal_temperature(p, yesterday, today, tomorrow, 24.0);
  const DiurnalDay after{14, 26, sun};
  CHECK(diurnal_temperature(p, today, tomorrow, after, 0.0) == Approx(end_of_day).margin(1e-9));
  // Every hour lies between the lowest minimum and the highest maximum around it.
  for (double t = 0; t < 24; t += 0.25) {
    const double v = diurnal_temperature(p, yesterday, today, tomorrow, t);
    CHECK(v >= 10.0 - 1e-9);
    CHECK(v <= 30.0 + 1e-9);
  }
}

TEST_CASE("two overpass samples give back the extremes they were taken from",
          "[thermal][diurnal]") {
  const DiurnalParameters p;
  const SunTimes sun = sun_times(-3.0, 200);
  const double tmin = 12.5, tmax = 41.0;
  const double day = tmin + (tmax - tmin) * diurnal_shape(p, sun, 13.5);
  const double night = tmin + (tmax - tmin) * diurnal_shape(p, sun, 1.5);
  CHECK(day < tmax);
  CHECK(night > tmin);
  const DiurnalDay d = extremes_from_samples(p, sun, day, 13.5, night, 1.5);
  CHECK(d.tmin == Approx(tmin).margin(1e-9));
  CHECK(d.tmax == Approx(tmax).margin(1e-9));
  // Not warmer by day than by night: a flat day at the mean.
  const DiurnalDay flat = extremes_from_samples(p, sun, 20.0, 13.5, 22.0, 1.5);
  CHECK(flat.tmin == 21.0);
  CHECK(flat.tmax == 21.0);
  CHECK(std::isnan(extremes_from_samples(p, sun, NAN, 13.5, 22.0, 1.5).tmin));
}

TEST_CASE("r0-2013: traits are cut to zero before the product", "[thermal][models]") {
  const ThermalModel r0(ThermalModelKind::r0_2013, Parasite::falciparum,
                        ThermalParameters::defaults());
  // At 15.0 C the published quadratics of EFD and pEA are both negative (Mordecai et al. 2013
  // coefficients): their raw product is positive, R0 must still be 0.
  const double t = 15.0;
  const double efd = -0.153 * t * t + 8.61 * t - 97.7, pea = -0.00924 * t * t + 0.453 * t - 4.77;
  REQUIRE(efd < 0);
  REQUIRE(pea < 0);
  CHECK(r0.relative(t) == 0.0);
  CHECK(r0.relative(15.7) == 0.0);
  CHECK(r0.relative(33.8) == 0.0);
  CHECK(r0.relative(20.0) > 0.0);
  CHECK(r0.optimum() == Approx(25.6).margin(0.1));  // issue #5: maximum at 25.6 +- 0.1 C
  CHECK(r0.relative(r0.optimum()) == Approx(1.0).margin(1e-12));
  CHECK(std::isnan(r0.relative(NAN)));
}

TEST_CASE("degree-day: incubation and Martens survival as published", "[thermal][models]") {
  const ThermalParameters table = ThermalParameters::defaults();
  const ThermalModel falciparum(ThermalModelKind::degree_day, Parasite::falciparum, table);
  const ThermalModel vivax(ThermalModelKind::degree_day, Parasite::vivax, table);
  // Detinova (1962): 111 degree-days above 16 C; 105 above 14.5 C for vivax.
  CHECK(falciparum.incubation_days(25.0) == Approx(111.0 / 9.0));
  CHECK(vivax.incubation_days(25.0) == Approx(10.0));
  CHECK(std::isinf(falciparum.incubation_days(16.0)));
  // Martens (1997) p = exp(-1/(-4.4 + 1.31 T - 0.03 T^2)): 0.9030, 0.9011, 0.8811 at 20, 25, 30 C.
  CHECK(falciparum.daily_survival(20.0) == Approx(0.9030).margin(5e-5));
  CHECK(falciparum.daily_survival(25.0) == Approx(0.9011).margin(5e-5));
  CHECK(falciparum.daily_survival(30.0) == Approx(0.8811).margin(5e-5));
  CHECK(falciparum.relative(16.0) == 0.0);
  CHECK(falciparum.relative(falciparum.optimum()) == Approx(1.0).margin(1e-12));
  for (double t = 0; t < 45; t += 0.5) {
    CHECK(falciparum.relative(t) >= 0.0);
    CHECK(falciparum.relative(t) <= 1.0 + 1e-12);
  }
}

TEST_CASE("window: inclusive limits, overridable", "[thermal][models]") {
  const ThermalParameters table = ThermalParameters::defaults();
  const ThermalModel window(ThermalModelKind::window, Parasite::falciparum, table);
  CHECK(window.relative(17.99) == 0.0);
  CHECK(window.relative(18.0) == 1.0);
  CHECK(window.relative(34.0) == 1.0);
  CHECK(window.relative(34.01) == 0.0);
  const ThermalModel narrow(ThermalModelKind::window, Parasite::falciparum, table, 20, 25);
  CHECK(narrow.relative(19.0) == 0.0);
  CHECK(narrow.relative(22.0) == 1.0);
  CHECK_THROWS_AS(ThermalModel(ThermalModelKind::window, Parasite::falciparum, table, 30, 20),
                  UsageError);
}

TEST_CASE("parameter table: every entry has a source; a TOML file overrides it",
          "[thermal][parameters]") {
  ThermalParameters table = ThermalParameters::defaults();
  for (const ThermalParameter& e : table.entries()) {
    CHECK(!e.source.empty());
    CHECK(!e.meaning.empty());
  }
  const std::string good = temp_file("[diurnal]\na = 2.5\n[window]\nlimits = [16, 30]\n");
  table.override_from_file(good);
  CHECK(table.value("diurnal", "a") == 2.5);
  CHECK(table.value("diurnal", "b") == 2.20);
  CHECK(table.values("window", "limits") == std::vector<double>{16, 30});
  // A written section reads back.
  const std::string written = temp_file(table.to_toml("diurnal"));
  ThermalParameters again = ThermalParameters::defaults();
  again.override_from_file(written);
  CHECK(again.value("diurnal", "a") == 2.5);
  // Errors name the file and change nothing.
  const std::string unknown = temp_file("[diurnal]\nd = 1\n");
  const std::string count = temp_file("[r0-2013]\nbiting_rate = [1, 2]\n");
  const std::string broken = temp_file("[diurnal\na = 1\n");
  for (const std::string& bad : {unknown, count, broken}) {
    ThermalParameters t = ThermalParameters::defaults();
    try {
      t.override_from_file(bad);
      FAIL("expected an InputError for " << bad);
    } catch (const InputError& e) {
      CHECK(e.where() == bad);
    }
    CHECK(t.value("diurnal", "a") == 1.86);
  }
  for (const std::string& f : {good, written, unknown, count, broken}) std::remove(f.c_str());
}

TEST_CASE("parameter files: diurnal a, b, c within the calibration's ranges, window in order",
          "[thermal][parameters]") {
  // The edges are accepted (the ranges --calibrate searches: 0..6 h, 0.01..20, -3..3 h).
  const std::string edges = temp_file("[diurnal]\na = 0\nb = 20\nc = -3\n");
  ThermalParameters table = ThermalParameters::defaults();
  table.override_from_file(edges);
  CHECK(table.value("diurnal", "a") == 0);
  CHECK(table.value("diurnal", "b") == 20);
  CHECK(table.value("diurnal", "c") == -3);
  std::vector<std::string> files{edges};
  for (const auto& [text, key] : std::vector<std::pair<std::string, std::string>>{
           {"[diurnal]\na = -5\n", "'diurnal.a' = -5"},
           {"[diurnal]\na = 6.5\n", "'diurnal.a' = 6.5"},
           {"[diurnal]\nb = -3\n", "'diurnal.b' = -3"},
           {"[diurnal]\nb = 0\n", "'diurnal.b' = 0"},
           {"[diurnal]\nc = 3.5\n", "'diurnal.c' = 3.5"},
           {"[diurnal]\na = 2\nb = 0.001\n", "'diurnal.b' = 0.001"},
           {"[window]\nlimits = [30, 20]\n", "'window.limits' = [30, 20]"},
           {"[window]\nlimits = [20, 20]\n", "'window.limits' = [20, 20]"}}) {
    const std::string bad = temp_file(text);
    files.push_back(bad);
    ThermalParameters t = ThermalParameters::defaults();
    try {
      t.override_from_file(bad);
      FAIL("expected an InputError for " << text);
    } catch (const InputError& e) {
      CHECK(e.where() == bad);
      CHECK_THAT(e.reason(), Catch::Contains(key));
    }
    // Nothing changed, not even the keys before the bad one.
    CHECK(t.value("diurnal", "a") == 1.86);
    CHECK(t.values("window", "limits") == std::vector<double>{18, 34});
  }
  for (const std::string& f : files) std::remove(f.c_str());
}

TEST_CASE("suitable runs: counts, longest run with and without wrap-around", "[thermal][runs]") {
  const double v[12] = {0.5, 0.2, 0, 0, 0, 0.1, 0, 0, 0, 0, 0.3, 0.4};
  const SuitableRun year = suitable_runs(v, 12, 0.0, false);
  CHECK(year.count == 5);
  CHECK(year.longest == 2);
  CHECK(year.mean == Approx(1.5 / 12));
  CHECK(suitable_runs(v, 12, 0.0, true).longest == 4);  // Nov-Dec-Jan-Feb
  CHECK(suitable_runs(v, 12, 0.25, true).count == 3);
  const double all[3] = {1, 1, 1};
  CHECK(suitable_runs(all, 3, 0.0, true).longest == 3);
  const double gap[3] = {1, NAN, 1};
  CHECK(std::isnan(suitable_runs(gap, 3, 0.0, true).count));
}
