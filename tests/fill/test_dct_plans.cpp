// Mechanics of the DCT plan cache (fill/dct_pls.hpp): timed plans kept as FFTW wisdom, and the
// space-only transforms the solver uses. The transforms themselves are checked against
// scipy.fft in tests/reference/test_spacetime_scipy.py.

#include <catch2/catch.hpp>

#include <tbb/task_arena.h>

#include <cmath>
#include <cstdlib>
#include <cstring>
#include <optional>
#include <filesystem>
#include <fstream>
#include <random>
#include <string>
#include <thread>
#include <unistd.h>
#include <vector>

#include "fill/dct_pls.hpp"

using namespace kalends::detail;

namespace {

std::vector<double> random_values(std::size_t n, unsigned seed) {
  std::mt19937 rng(seed);
  std::normal_distribution<double> normal(0.0, 1.0);
  std::vector<double> v(n);
  for (double& x : v) x = normal(rng);
  return v;
}

std::string read_file(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  return {std::istreambuf_iterator<char>(in), std::istreambuf_iterator<char>()};
}

// A folder of its own under the system temporary folder, removed at the end.
struct TemporaryFolder {
  std::filesystem::path path = std::filesystem::temp_directory_path() /
                               ("kalends-dct-" + std::to_string(::getpid()));
  TemporaryFolder() { std::filesystem::remove_all(path); }
  ~TemporaryFolder() { std::filesystem::remove_all(path); }
};

}  // namespace

TEST_CASE("timed plans give the estimated plans' transforms and keep their wisdom in a file") {
  TemporaryFolder folder;
  const std::string wisdom = (folder.path / "cache" / "fftw-wisdom").string();
  const Shape3 shape{12, 10, 9};
  const std::size_t n = 12 * 10 * 9;
  const auto x = random_values(n, 7);

  DctBuffer estimated(n), timed(n);
  std::copy(x.begin(), x.end(), estimated.data());
  std::copy(x.begin(), x.end(), timed.data());
  DctPlanCache by_estimate(DctPlanning{false, ""});
  by_estimate.forward(shape, estimated.data());
  {
    DctPlanCache measured(DctPlanning{true, wisdom});
    measured.forward(shape, timed.data());
    for (std::size_t i = 0; i < n; ++i) REQUIRE(timed[i] == Approx(estimated[i]).margin(1e-9));
  }
  // The wisdom file was created (with its folder) and holds FFTW's text format.
  REQUIRE(std::filesystem::exists(wisdom));
  const std::string text = read_file(wisdom);
  REQUIRE(text.rfind("(fftw-3", 0) == 0);
  // A second cache reads it and plans the same shape without error.
  DctPlanCache again(DctPlanning{true, wisdom});
  std::copy(x.begin(), x.end(), timed.data());
  again.inverse(shape, timed.data());
  std::copy(x.begin(), x.end(), estimated.data());
  by_estimate.inverse(shape, estimated.data());
  for (std::size_t i = 0; i < n; ++i) REQUIRE(timed[i] == Approx(estimated[i]).margin(1e-9));
}

TEST_CASE("a wisdom file that cannot be written or read is no error") {
  TemporaryFolder folder;
  std::filesystem::create_directories(folder.path);
  // A file where the cache folder should be: nothing can be created below it.
  const auto blocker = folder.path / "not-a-folder";
  std::ofstream(blocker) << "x";
  const std::string wisdom = (blocker / "fftw-wisdom").string();
  const Shape3 shape{4, 5, 6};
  DctBuffer data(120);
  for (int i = 0; i < 120; ++i) data[i] = i;
  DctPlanCache plans(DctPlanning{true, wisdom});
  plans.forward(shape, data.data());
  plans.inverse(shape, data.data());
  // inverse(forward(x)) = 8 n0 n1 n2 x.
  for (int i = 0; i < 120; ++i) REQUIRE(data[i] == Approx(8.0 * 120 * i).margin(1e-6));
  REQUIRE_FALSE(std::filesystem::exists(wisdom));
  // Garbage in the file is ignored too.
  const auto garbled = folder.path / "garbled";
  std::ofstream(garbled) << "(not wisdom";
  DctPlanCache reads_garbage(DctPlanning{true, garbled.string()});
  reads_garbage.forward(shape, data.data());
}

TEST_CASE("two plan caches plan in two threads at once and transform as one does alone") {
  // FFTW's planner is one per process: two caches (two methods, as a program using the library
  // runs two fills in two threads) had planned at the same time under their own locks, and the
  // process died in FFTW's planner (a helper: 12 of 12 runs). Timed plans of many shapes, each
  // checked against an estimated plan's transform made before the threads start.
  TemporaryFolder folder;
  std::vector<Shape3> shapes;
  for (int a = 6; a <= 20; a += 2)
    for (int b = 5; b <= 9; ++b) shapes.push_back({a, b, 3});
  std::vector<std::vector<double>> expected;
  DctPlanCache reference(DctPlanning{false, ""});
  for (const Shape3& shape : shapes) {
    const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
    const auto x = random_values(n, 11);
    DctBuffer data(n);
    std::copy(x.begin(), x.end(), data.data());
    reference.forward(shape, data.data());
    expected.emplace_back(data.data(), data.data() + n);
  }
  std::vector<int> wrong(2, 0);
  auto work = [&](int k) {
    DctPlanCache plans(DctPlanning{true, (folder.path / ("wisdom-" + std::to_string(k))).string()});
    for (std::size_t s = 0; s < shapes.size(); ++s) {
      const Shape3& shape = shapes[s];
      const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
      const auto x = random_values(n, 11);
      DctBuffer data(n);
      std::copy(x.begin(), x.end(), data.data());
      plans.forward(shape, data.data());
      for (std::size_t i = 0; i < n; ++i) wrong[k] += std::abs(data[i] - expected[s][i]) > 1e-9;
    }
  };
  std::thread first(work, 0), second(work, 1);
  first.join();
  second.join();
  REQUIRE(wrong[0] == 0);
  REQUIRE(wrong[1] == 0);
}

TEST_CASE("space-only transforms act on axes 0 and 1 of every slot") {
  // Even lengths go through a real FFT (Makhoul's reordering), odd ones through FFTW's r2r
  // plans; each against FFTW's r2r transform of every slot's plane alone.
  for (const Shape3 shape : {Shape3{6, 5, 7}, Shape3{8, 2, 3}, Shape3{5, 9, 4}, Shape3{4, 6, 1},
                             Shape3{1, 8, 5}, Shape3{2, 2, 2}, Shape3{16, 12, 9}}) {
    CAPTURE(shape[0], shape[1], shape[2]);
    const std::size_t plane_size = std::size_t(shape[0]) * shape[1];
    const std::size_t n = plane_size * shape[2];
    const auto x = random_values(n, 11);
    DctPlanCache plans;
    DctBuffer mixed(n);
    std::copy(x.begin(), x.end(), mixed.data());
    plans.forward_space(shape, mixed.data());
    for (int s = 0; s < shape[2]; ++s) {
      DctBuffer plane(plane_size), back(plane_size);
      for (std::size_t p = 0; p < plane_size; ++p) plane[p] = back[p] = x[p * shape[2] + s];
      plans.forward({shape[0], shape[1], 1}, plane.data());
      for (std::size_t p = 0; p < plane_size; ++p)
        REQUIRE(mixed[p * shape[2] + s] == Approx(plane[p]).margin(1e-10));
    }
    // The inverse of each plane's values (as if they were a spectrum).
    DctBuffer inverse(n);
    std::copy(x.begin(), x.end(), inverse.data());
    plans.inverse_space(shape, inverse.data());
    for (int s = 0; s < shape[2]; ++s) {
      DctBuffer plane(plane_size);
      for (std::size_t p = 0; p < plane_size; ++p) plane[p] = x[p * shape[2] + s];
      plans.inverse({shape[0], shape[1], 1}, plane.data());
      for (std::size_t p = 0; p < plane_size; ++p)
        REQUIRE(inverse[p * shape[2] + s] == Approx(plane[p]).margin(1e-10));
    }
    plans.inverse_space(shape, mixed.data());
    // inverse_space(forward_space(x)) = 4 n0 n1 x (a factor 2 n per axis longer than 1).
    double factor = 1;
    for (int k = 0; k < 2; ++k)
      if (shape[k] > 1) factor *= 2.0 * shape[k];
    for (std::size_t i = 0; i < n; ++i) REQUIRE(mixed[i] == Approx(factor * x[i]).margin(1e-9));
  }
}

TEST_CASE("the solve gives the same doubles on one thread and on two") {
  // Its loops and sums are cut in pieces that do not depend on the threads (engine/parallel.hpp).
  // 37 x 41 x 23 is larger than one piece of the sums and has odd lengths (unaligned rows).
  const Shape3 shape{37, 41, 23};
  const std::size_t n = std::size_t(37) * 41 * 23;
  const auto y = random_values(n, 3), coin = random_values(n, 4);
  std::vector<double> w(n);
  for (std::size_t i = 0; i < n; ++i) w[i] = coin[i] > 0.3 ? 1.0 : 0.0;
  DctPlanCache plans;
  auto run = [&](int threads) {
    std::vector<double> z(n, 0.0);
    PlsWorkspace ws;
    PlsResult result;
    tbb::task_arena(threads).execute(
        [&] { result = solve_pls(plans, shape, y, w, PlsSettings{2.0, 0.5, 1e-8, 500, false}, z, ws); });
    REQUIRE(result.converged);
    return z;
  };
  const auto one = run(1), two = run(2);
  REQUIRE(std::memcmp(one.data(), two.data(), n * sizeof(double)) == 0);

  // Whole slots without data, kept in the space-DCT domain inside the solve: runs at odd
  // offsets (unaligned plans) at the start, in the middle and at the end.
  for (std::size_t i = 0; i < n; ++i) {
    const std::size_t slot = i % 23;
    if (slot < 2 || (slot >= 9 && slot < 14) || slot == 22) w[i] = 0.0;
  }
  const auto one_gappy = run(1), two_gappy = run(2);
  REQUIRE(std::memcmp(one_gappy.data(), two_gappy.data(), n * sizeof(double)) == 0);
}

TEST_CASE("single-precision space transforms match the double ones and keep their own wisdom") {
  TemporaryFolder folder;
  const std::string wisdom = (folder.path / "fftw-wisdom").string();
  // Slots 1..3 and 6..8 only, at odd offsets; even (real FFT) and odd (r2r) lengths.
  const SlotRun runs[] = {{1, 3}, {6, 3}};
  DctPlanCache plans(DctPlanning{true, wisdom});
  for (const Shape3 shape : {Shape3{12, 10, 9}, Shape3{7, 9, 9}}) {
    const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
    const auto x = random_values(n, 11);
    DctBuffer wide(n);
    BasicDctBuffer<float> narrow(n);
    for (std::size_t i = 0; i < n; ++i) {
      wide[i] = x[i];
      narrow[i] = float(x[i]);
    }
    for (bool inverse : {false, true}) {
      if (inverse) {
        plans.inverse_space(shape, wide.data(), runs);
        plans.inverse_space(shape, narrow.data(), runs);
      } else {
        plans.forward_space(shape, wide.data(), runs);
        plans.forward_space(shape, narrow.data(), runs);
      }
      for (std::size_t i = 0; i < n; ++i) {
        // Unnormalised: up to 4 n0 n1 |x| (480 |x| here) after both; float keeps 7 digits.
        REQUIRE(narrow[i] == Approx(wide[i]).margin(inverse ? 1e-2 : 1e-3));
        const std::size_t slot = i % 9;
        if (slot == 0 || slot == 4 || slot == 5) REQUIRE(narrow[i] == float(x[i]));  // untouched
      }
    }
  }
  REQUIRE(std::filesystem::exists(wisdom + ".single"));
  REQUIRE(read_file(wisdom + ".single").rfind("(fftw-3", 0) == 0);
}

TEST_CASE("the single-precision solve agrees with the double one and does not depend on threads") {
  const Shape3 shape{37, 41, 23};
  const std::size_t n = std::size_t(37) * 41 * 23;
  const auto y = random_values(n, 5), coin = random_values(n, 6);
  std::vector<double> w(n);
  for (std::size_t i = 0; i < n; ++i) {
    const std::size_t slot = i % 23;
    // Gaps at random and whole slots without data (kept as spectra inside the solve).
    w[i] = coin[i] > 0.3 && slot != 0 && slot != 9 && slot != 10 ? 1.0 : 0.0;
  }
  DctPlanCache plans;
  auto run = [&](int threads, bool single, double tolerance) {
    std::vector<double> z(n, 0.0);
    PlsWorkspace ws;
    PlsResult result;
    PlsSettings settings{2.0, 0.5, tolerance, 500, false, single};
    tbb::task_arena(threads).execute([&] { result = solve_pls(plans, shape, y, w, settings, z, ws); });
    REQUIRE(result.converged);
    return z;
  };
  const auto one = run(1, true, 1e-5), two = run(2, true, 1e-5);
  REQUIRE(std::memcmp(one.data(), two.data(), n * sizeof(double)) == 0);
  const auto exact = run(2, false, 1e-10);
  double worst = 0;
  for (std::size_t i = 0; i < n; ++i) worst = std::max(worst, std::abs(one[i] - exact[i]));
  // Data of sd 1: a solve stopped at a relative residual of 1e-5 in single precision.
  REQUIRE(worst < 1e-4);
  REQUIRE(worst > 0);  // it is the single-precision path
}

TEST_CASE("the coarse-grid start changes where the solve starts, not its solution") {
  // A smooth field with a 40 x 40 px hole over half the slots (the values deep inside it are
  // the smooth parts the coarse grids resolve), scattered gaps and two slots without data; odd
  // and even lengths so that the coarse grids have edge cells of one fine row.
  const Shape3 shape{96, 83, 24};
  const std::size_t n = std::size_t(96) * 83 * 24;
  const auto noise = random_values(n, 7), coin = random_values(n, 8);
  std::vector<double> y(n), w(n);
  for (int i = 0; i < 96; ++i)
    for (int j = 0; j < 83; ++j)
      for (int t = 0; t < 24; ++t) {
        const std::size_t k = (std::size_t(i) * 83 + j) * 24 + t;
        y[k] = std::sin(i / 9.0) * std::cos(j / 7.0) + 0.5 * std::sin(t / 3.0) + 0.1 * noise[k];
        const bool hole = i >= 30 && i < 70 && j >= 20 && j < 60 && t >= 6 && t < 18;
        w[k] = hole || coin[k] < -1.0 || t == 3 || t == 20 ? 0.0 : 1.0;
      }
  DctPlanCache plans;
  auto run = [&](bool coarse, double tolerance, PlsResult& result) {
    std::vector<double> z(n, 0.0);
    PlsWorkspace ws;
    PlsSettings settings{3.0, 0.3, tolerance, 2000, false, false};
    settings.coarse_start = coarse;
    result = solve_pls(plans, shape, y, w, settings, z, ws);
    REQUIRE(result.converged);
    return z;
  };
  PlsResult with, without;
  const auto exact_with = run(true, 1e-11, with), exact_without = run(false, 1e-11, without);
  double differs = 0;
  for (std::size_t i = 0; i < n; ++i) differs = std::max(differs, std::abs(exact_with[i] - exact_without[i]));
  REQUIRE(differs < 1e-7);
  // At a loose tolerance the fine solve stops with the hole's inside closer to the solution with
  // the coarse start than without, after fewer than half the iterations.
  const auto loose_with = run(true, 1e-4, with), loose_without = run(false, 1e-4, without);
  double error_with = 0, error_without = 0;
  for (int i = 40; i < 60; ++i)
    for (int j = 30; j < 50; ++j)
      for (int t = 8; t < 16; ++t) {
        const std::size_t k = (std::size_t(i) * 83 + j) * 24 + t;
        error_with = std::max(error_with, std::abs(loose_with[k] - exact_with[k]));
        error_without = std::max(error_without, std::abs(loose_without[k] - exact_with[k]));
      }
  CAPTURE(error_with, error_without, with.iterations, without.iterations);
  // Measured: 0.0090 against 0.0157, after 15 iterations against 37.
  REQUIRE(error_with < error_without);
  REQUIRE(2 * with.iterations < without.iterations);
}

TEST_CASE("the wisdom cache ignores a relative XDG_CACHE_HOME", "[fill][dct]") {
  // The XDG Base Directory specification: such a path is invalid. It had put the cache under
  // whatever folder a cron job started in.
  auto saved = [](const char* name) -> std::optional<std::string> {
    const char* v = std::getenv(name);
    return v ? std::optional<std::string>(v) : std::nullopt;
  };
  const auto kalends = saved("KALENDS_CACHE_DIR"), xdg = saved("XDG_CACHE_HOME"), home = saved("HOME");
  ::unsetenv("KALENDS_CACHE_DIR");
  ::setenv("HOME", "/home/someone", 1);
  ::setenv("XDG_CACHE_HOME", "relative/dir", 1);
  CHECK(default_wisdom_file() == "/home/someone/.cache/kalends/fftw-wisdom");
  ::setenv("XDG_CACHE_HOME", "/var/cache/user", 1);
  CHECK(default_wisdom_file() == "/var/cache/user/kalends/fftw-wisdom");
  auto restore = [](const char* name, const std::optional<std::string>& v) {
    if (v) ::setenv(name, v->c_str(), 1);
    else ::unsetenv(name);
  };
  restore("KALENDS_CACHE_DIR", kalends);
  restore("XDG_CACHE_HOME", xdg);
  restore("HOME", home);
}
