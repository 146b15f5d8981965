#include "fill/harmonic.hpp"

#include <Eigen/Dense>
#include <fmt/format.h>
#include <cmath>
#include <numbers>

#include "fill/gap_limit.hpp"
#include "io/json_text.hpp"
#include "kalends/error.hpp"

namespace kalends {

namespace {
constexpr double year_days = 365.25;
constexpr int max_rejection_rounds = 10;
}  // namespace

HarmonicMethod::HarmonicMethod(const MethodOptions& options) : options_(options) {
  if (options.harmonics < 1 || options.harmonics > 12)
    throw UsageError("--harmonics", "must be 1..12");
  if (!(options.reject_below > 0)) throw UsageError("--reject-below", "must be positive");
}

MethodParameters HarmonicMethod::parameters() const {
  // The numbers as given, whole: the gaps had been cut to whole days (40.7 recorded as 40).
  return {{"harmonics", std::to_string(options_.harmonics)},
          {"trend", options_.trend ? "yes" : "no"},
          {"reject_below", detail::shortest_number(options_.reject_below)},
          {"period_days", "365.25"},
          {"max_gap_days", detail::shortest_number(options_.max_gap_days)},
          {"max_extrapolation_days", detail::shortest_number(options_.max_extrapolation_days)}};
}

std::vector<double> HarmonicMethod::design(std::span<const double> days) const {
  const int p = coefficients();
  std::vector<double> x(days.size() * p);
  double mean = 0;
  for (double d : days) mean += d;
  mean /= std::max<std::size_t>(1, days.size());
  for (std::size_t i = 0; i < days.size(); ++i) {
    double* row = x.data() + i * p;
    int c = 0;
    row[c++] = 1.0;
    if (options_.trend) row[c++] = (days[i] - mean) / year_days;
    for (int j = 1; j <= options_.harmonics; ++j) {
      const double angle = 2 * std::numbers::pi * j * days[i] / year_days;
      row[c++] = std::cos(angle);
      row[c++] = std::sin(angle);
    }
  }
  return x;
}

HarmonicMethod::SeriesFit HarmonicMethod::fit(std::span<const double> x, std::span<const float> y,
                                              std::span<const float> w, std::span<float> fitted,
                                              std::span<float> sd,
                                              std::span<std::uint8_t> rejected) const {
  const int p = coefficients();
  const int n = int(y.size());
  SeriesFit result;
  std::vector<char> use(n, 0);
  for (int i = 0; i < n; ++i) use[i] = w[i] > 0 && std::isfinite(y[i]);
  std::fill(rejected.begin(), rejected.end(), 0);
  using Matrix = Eigen::MatrixXd;
  using Vector = Eigen::VectorXd;
  Matrix normal(p, p);
  Vector rhs(p), beta(p);
  Eigen::LDLT<Matrix> ldlt;
  auto unfillable = [&] {
    std::fill(fitted.begin(), fitted.end(), NAN);
    std::fill(sd.begin(), sd.end(), NAN);
    return result;
  };
  for (int round = 0;; ++round) {
    normal.setZero();
    rhs.setZero();
    int m = 0;
    for (int i = 0; i < n; ++i) {
      if (!use[i]) continue;
      Eigen::Map<const Vector> row(x.data() + std::size_t(i) * p, p);
      normal.selfadjointView<Eigen::Lower>().rankUpdate(row, double(w[i]));
      rhs += double(w[i]) * double(y[i]) * row;
      ++m;
    }
    result.observations = m;
    if (m < std::max(p + 1, options_.min_observations_per_coefficient * p)) return unfillable();
    normal = normal.selfadjointView<Eigen::Lower>();
    ldlt.compute(normal);
    if (ldlt.info() != Eigen::Success || ldlt.rcond() < 1e-6) {
      result.ill_conditioned = true;
      return unfillable();
    }
    beta = ldlt.solve(rhs);
    double rss = 0;
    for (int i = 0; i < n; ++i) {
      if (!use[i]) continue;
      Eigen::Map<const Vector> row(x.data() + std::size_t(i) * p, p);
      const double r = double(y[i]) - row.dot(beta);
      rss += double(w[i]) * r * r;
    }
    result.sigma = std::sqrt(rss / (m - p));
    if (round == max_rejection_rounds) break;
    // Reject observations far below the curve; stop when none is, or too few would remain.
    int dropped = 0;
    std::vector<char> next = use;
    for (int i = 0; i < n; ++i) {
      if (!use[i]) continue;
      Eigen::Map<const Vector> row(x.data() + std::size_t(i) * p, p);
      if (double(y[i]) - row.dot(beta) < -options_.reject_below * result.sigma) {
        next[i] = 0;
        ++dropped;
      }
    }
    if (dropped == 0 || m - dropped < std::max(p + 1, options_.min_observations_per_coefficient * p)) break;
    for (int i = 0; i < n; ++i)
      if (use[i] && !next[i]) rejected[i] = 1;
    result.rejected += dropped;
    use.swap(next);
  }
  const Matrix covariance = ldlt.solve(Matrix::Identity(p, p));
  const double low = options_.clamp_min.value_or(-INFINITY);
  const double high = options_.clamp_max.value_or(INFINITY);
  for (int i = 0; i < n; ++i) {
    Eigen::Map<const Vector> row(x.data() + std::size_t(i) * p, p);
    fitted[i] = float(std::clamp(row.dot(beta), low, high));
    // Where the value stands in for an observation (a gap, a rejected one), its error is the
    // curve's plus the scatter of observations about it.
    const double scatter = use[i] ? 0.0 : 1.0;
    sd[i] = BlockOutput::sd_value(result.sigma * std::sqrt(std::max(0.0, row.dot(covariance * row)) + scatter));
  }
  result.coefficients.assign(beta.data(), beta.data() + p);
  result.fitted = true;
  return result;
}

void HarmonicMethod::fill(const BlockInput& in, BlockOutput& out) const {
  const int n = in.grid->size;
  const std::vector<double> x = design(in.grid->slot_days);
  const int p = coefficients();
  const int least = std::max(p + 1, options_.min_observations_per_coefficient * p);
  const std::string too_few = fmt::format("fewer than {} observations for {} coefficients", least, p);
  const std::string ill_conditioned =
      options_.harmonics > 1
          ? fmt::format("observations cover too little of the year to determine {} harmonics; try fewer with "
                        "--harmonics",
                        options_.harmonics)
          : std::string("observations cover too little of the year to determine even 1 harmonic");
  for (std::int64_t core_pixel = 0; core_pixel < in.core.pixels(); ++core_pixel) {
    const std::int64_t read_pixel = in.read_pixel_of(core_pixel);
    const auto [fitted, sd, rejected] = out.series(core_pixel, n);
    const SeriesFit f =
        fit(x, in.series(read_pixel), in.series_weights(read_pixel), fitted, sd, rejected);
    if (!f.fitted && f.observations > 0)
      ++out.not_fitted[f.ill_conditioned ? ill_conditioned : too_few];
    detail::limit_gaps(*in.grid, in.series_weights(read_pixel), rejected,
                       options_.max_gap_days, options_.max_extrapolation_days, fitted, sd);
  }
}

std::unique_ptr<FillMethod> make_harmonic(const MethodOptions& options) {
  return std::make_unique<HarmonicMethod>(options);
}

}  // namespace kalends
