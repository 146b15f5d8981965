#include "report/time_series_plot.hpp"

#include <fmt/format.h>

#include <algorithm>
#include <cmath>

#include "kalends/time.hpp"
#include "report/colour_ramp.hpp"

namespace kalends::detail {

namespace {

// Tick step of 1, 2 or 5 times a power of ten giving about `count` ticks (common practice).
double nice_step(double span, int count) {
  const double raw = span / count;
  const double power = std::pow(10.0, std::floor(std::log10(raw)));
  for (double m : {1.0, 2.0, 5.0, 10.0})
    if (m * power >= raw) return m * power;
  return 10 * power;
}

}  // namespace

std::string time_series_svg(const std::vector<PlotDate>& dates, const std::string& unit, int width, int height) {
  const double left = 58, right = 12, top = 26, bottom = 28;
  double lo = INFINITY, hi = -INFINITY;
  for (const PlotDate& d : dates) {
    for (double v : {d.value - d.sd, d.value + d.sd, d.raw, d.synoptic, d.value})
      if (std::isfinite(v)) lo = std::min(lo, v), hi = std::max(hi, v);
  }
  std::string svg = fmt::format(
      "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{0}\" height=\"{1}\" viewBox=\"0 0 {0} {1}\" "
      "role=\"img\" class=\"plot\">\n<rect width=\"{0}\" height=\"{1}\" fill=\"#ffffff\"/>\n",
      width, height);
  if (dates.empty() || !std::isfinite(lo)) return svg + "<text x=\"10\" y=\"20\">no values at this pixel</text></svg>\n";
  if (hi - lo < 1e-12) lo -= 0.5, hi += 0.5;
  const double pad = 0.05 * (hi - lo);
  lo -= pad, hi += pad;
  const double t0 = dates.front().day, t1 = std::max(dates.back().day, t0 + 1);
  auto sx = [&](double t) { return left + (t - t0) / (t1 - t0) * (width - left - right); };
  auto sy = [&](double v) { return top + (hi - v) / (hi - lo) * (height - top - bottom); };
  // axes and ticks
  svg += fmt::format("<g font-family=\"sans-serif\" font-size=\"11\" fill=\"#333\" stroke=\"none\">\n");
  const double step = nice_step(hi - lo, 5);
  for (double v = std::ceil(lo / step) * step; v <= hi; v += step) {
    svg += fmt::format("<line x1=\"{:.1f}\" x2=\"{:.1f}\" y1=\"{:.1f}\" y2=\"{:.1f}\" stroke=\"#e3e3e3\"/>", left,
                       width - right, sy(v), sy(v));
    svg += fmt::format("<text x=\"{:.1f}\" y=\"{:.1f}\" text-anchor=\"end\">{:g}</text>\n", left - 4, sy(v) + 4,
                       std::abs(v) < step * 1e-6 ? 0.0 : v);
  }
  for (int year = civil_from_days(std::int64_t(t0)).year; ; ++year) {
    const double t = double(days_from_civil(year, 1, 1));
    if (t > t1) break;
    if (t < t0) continue;
    svg += fmt::format("<line x1=\"{0:.1f}\" x2=\"{0:.1f}\" y1=\"{1:.1f}\" y2=\"{2:.1f}\" stroke=\"#bbbbbb\"/>", sx(t),
                       top, height - bottom);
    svg += fmt::format("<text x=\"{:.1f}\" y=\"{:.1f}\">{}</text>\n", sx(t) + 3, height - bottom + 14, year);
  }
  svg += fmt::format("<text x=\"12\" y=\"{:.1f}\" transform=\"rotate(-90 12 {:.1f})\" text-anchor=\"middle\">{}</text>\n",
                     (top + height - bottom) / 2, (top + height - bottom) / 2, unit.empty() ? "value" : unit);
  svg += "</g>\n";
  // +-1 sd band: upper edge forward, lower edge back, over each run of dates with a curve
  std::vector<std::vector<const PlotDate*>> runs(1);
  for (const PlotDate& d : dates) {
    if (std::isfinite(d.value) && std::isfinite(d.sd)) runs.back().push_back(&d);
    else if (!runs.back().empty()) runs.emplace_back();
  }
  for (const auto& run : runs) {
    if (run.size() < 2) continue;
    std::string points;
    for (const PlotDate* d : run) points += fmt::format("{:.1f},{:.1f} ", sx(d->day), sy(d->value + d->sd));
    for (auto it = run.rbegin(); it != run.rend(); ++it)
      points += fmt::format("{:.1f},{:.1f} ", sx((*it)->day), sy((*it)->value - (*it)->sd));
    svg += "<polygon class=\"sd-band\" fill=\"#56b4e9\" fill-opacity=\"0.3\" stroke=\"none\" points=\"" + points + "\"/>\n";
  }
  auto polyline = [&](auto get, const char* cls, const char* colour, const char* dash) {
    std::string out, points;
    auto flush = [&] {
      if (!points.empty())
        out += fmt::format("<polyline class=\"{}\" fill=\"none\" stroke=\"{}\" stroke-width=\"1.6\" {} points=\"{}\"/>\n",
                           cls, colour, dash, points);
      points.clear();
    };
    for (const PlotDate& d : dates) {
      const double v = get(d);
      if (std::isfinite(v)) points += fmt::format("{:.1f},{:.1f} ", sx(d.day), sy(v));
      else flush();
    }
    flush();
    return out;
  };
  svg += polyline([](const PlotDate& d) { return d.synoptic; }, "synoptic", "#666666", "stroke-dasharray=\"5 3\"");
  svg += polyline([](const PlotDate& d) { return d.value; }, "filled", "#0072b2", "");
  const std::string kept = hex(flag_colour(0)), rejected = hex(flag_colour(1));
  for (const PlotDate& d : dates) {
    if (!std::isfinite(d.raw)) continue;
    if (d.flag == 0)
      svg += fmt::format("<circle class=\"observed\" cx=\"{:.1f}\" cy=\"{:.1f}\" r=\"2.6\" fill=\"{}\"/>", sx(d.day),
                         sy(d.raw), kept);
    else if (d.flag == 1)
      svg += fmt::format("<path class=\"rejected\" d=\"M{0:.1f} {1:.1f}l6 6m0 -6l-6 6\" stroke=\"{2}\" stroke-width=\"1.6\" "
                         "transform=\"translate(-3 -3)\"/>", sx(d.day), sy(d.raw), rejected);
  }
  svg += "\n";
  // legend
  svg += fmt::format(
      "<g font-family=\"sans-serif\" font-size=\"11\" fill=\"#333\">"
      "<circle cx=\"{0}\" cy=\"12\" r=\"3\" fill=\"{1}\"/><text x=\"{2}\" y=\"16\">observed, kept</text>"
      "<path d=\"M{3} 9l6 6m0 -6l-6 6\" stroke=\"{4}\" stroke-width=\"1.6\"/><text x=\"{5}\" y=\"16\">rejected</text>"
      "<line x1=\"{6}\" x2=\"{7}\" y1=\"12\" y2=\"12\" stroke=\"#0072b2\" stroke-width=\"2\"/><text x=\"{8}\" y=\"16\">filled curve</text>"
      "<rect x=\"{9}\" y=\"7\" width=\"16\" height=\"10\" fill=\"#56b4e9\" fill-opacity=\"0.3\"/><text x=\"{10}\" y=\"16\">&#177;1 sd</text>"
      "<line x1=\"{11}\" x2=\"{12}\" y1=\"12\" y2=\"12\" stroke=\"#666\" stroke-dasharray=\"5 3\" stroke-width=\"1.6\"/><text x=\"{13}\" y=\"16\">synoptic cycle</text></g>\n",
      left + 4, kept, left + 11, left + 110, rejected, left + 120, left + 180, left + 198, left + 202, left + 280,
      left + 300, left + 350, left + 372, left + 376);
  return svg + "</svg>\n";
}

}  // namespace kalends::detail
