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

// The frame of a plot: white ground, value grid lines and labels, year ticks, the axis title;
// and the scales from day and value to pixels. The value range gets 5 % of room each side.
struct Frame {
  double left = 58, right = 12, top = 26, bottom = 28;
  int width, height;
  double t0, t1, lo, hi;
  Frame(int w, int h, double first_day, double last_day, double low, double high)
      : width(w), height(h), t0(first_day), t1(std::max(last_day, first_day + 1)), lo(low), hi(high) {
    if (hi - lo < 1e-12) lo -= 0.5, hi += 0.5;
    const double pad = 0.05 * (hi - lo);
    lo -= pad, hi += pad;
  }
  double x(double t) const { return left + (t - t0) / (t1 - t0) * (width - left - right); }
  double y(double v) const { return top + (hi - v) / (hi - lo) * (height - top - bottom); }
  std::string axes(const std::string& unit) const {
    std::string svg = "<g font-family=\"sans-serif\" font-size=\"11\" fill=\"#333\" stroke=\"none\">\n";
    const double step = nice_step(hi - lo, 5);
    for (double v = std::ceil(lo / step) * step; v <= hi; v += step) {
      svg += fmt::format("<line x1=\"{:.1f}\" x2=\"{:.1f}\" y1=\"{:.1f}\" y2=\"{:.1f}\" stroke=\"#e3e3e3\"/>", left,
                         width - right, y(v), y(v));
      svg += fmt::format("<text x=\"{:.1f}\" y=\"{:.1f}\" text-anchor=\"end\">{:g}</text>\n", left - 4, y(v) + 4,
                         std::abs(v) < step * 1e-6 ? 0.0 : v);
    }
    // Years; under two years, every month's first day (a series within one year had shown no
    // date on its axis at all), labelled with its month and, in January or first, its year.
    static constexpr const char* months[12] = {"Jan", "Feb", "Mar", "Apr", "May", "Jun",
                                               "Jul", "Aug", "Sep", "Oct", "Nov", "Dec"};
    // Labels are 11 px text, about 6.2 px a character (common practice for sans-serif at this
    // size); a month's label every `every` months so that "Jan 2022" (8 characters, with room)
    // never runs into the next one, as it had at 30 px a month.
    const bool monthly = t1 - t0 < 2 * 365.25;
    const double month_px = 30.44 / (t1 - t0) * (width - left - right);
    int every = 1;
    for (int k : {1, 2, 3, 6, 12}) {
      every = k;
      if (k * month_px >= 56) break;
    }
    bool labelled = false;
    for (int year = civil_from_days(std::int64_t(t0)).year;; ++year) {
      if (double(days_from_civil(year, 1, 1)) > t1) break;
      for (int month = 1; month <= (monthly ? 12 : 1); ++month) {
        const double t = double(days_from_civil(year, month, 1));
        if (t > t1) break;
        if (t < t0) continue;
        const bool year_line = month == 1;
        svg += fmt::format("<line x1=\"{0:.1f}\" x2=\"{0:.1f}\" y1=\"{1:.1f}\" y2=\"{2:.1f}\" stroke=\"{3}\"/>", x(t),
                           top, height - bottom, year_line ? "#bbbbbb" : "#eeeeee");
        if (monthly && (month - 1) % every != 0) continue;
        const std::string label = !monthly                        ? std::to_string(year)
                                  : year_line || !labelled        ? fmt::format("{} {}", months[month - 1], year)
                                                                  : std::string(months[month - 1]);
        svg += fmt::format("<text x=\"{:.1f}\" y=\"{:.1f}\">{}</text>\n", x(t) + 3, height - bottom + 14, label);
        labelled = true;
      }
    }
    // A series starting after 1 January (summers only, from May) had no label for its first
    // year: given at the left edge where it fits before the next one.
    if (!monthly) {
      const CivilDate first = civil_from_days(std::int64_t(t0));
      const double next = x(double(days_from_civil(first.year + 1, 1, 1)));
      if (double(days_from_civil(first.year, 1, 1)) < t0 && next - (left + 3) >= 6.2 * 4 + 6)
        svg += fmt::format("<text x=\"{:.1f}\" y=\"{:.1f}\">{}</text>\n", left + 3, height - bottom + 14, first.year);
    }
    svg += fmt::format("<text x=\"12\" y=\"{:.1f}\" transform=\"rotate(-90 12 {:.1f})\" text-anchor=\"middle\">{}</text>\n",
                       (top + height - bottom) / 2, (top + height - bottom) / 2, unit.empty() ? "value" : unit);
    return svg + "</g>\n";
  }
};

// An element role="img" hides its children from screen readers: its name (aria-label) is all
// they read (WAI-ARIA 1.2, role img).
std::string svg_start(int width, int height, const std::string& description) {
  return fmt::format(
      "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{0}\" height=\"{1}\" viewBox=\"0 0 {0} {1}\" "
      "role=\"img\" aria-label=\"{2}\" class=\"plot\">\n<rect width=\"{0}\" height=\"{1}\" fill=\"#ffffff\"/>\n",
      width, height, description);
}

// Polylines through the finite values of one curve, broken where it has none and where the
// dates leave a season without composites (`breaks`).
template <typename Get>
std::string broken_line(std::size_t count, Get point, const std::vector<bool>& breaks, const std::string& attributes) {
  std::string out, points;
  auto flush = [&] {
    if (!points.empty()) out += "<polyline fill=\"none\" stroke-width=\"1.6\" " + attributes + " points=\"" + points + "\"/>\n";
    points.clear();
  };
  for (std::size_t i = 0; i < count; ++i) {
    const auto [px, py] = point(i);
    if (i < breaks.size() && breaks[i]) flush();
    if (std::isfinite(py)) points += fmt::format("{:.1f},{:.1f} ", px, py);
    else flush();
  }
  flush();
  return out;
}

}  // namespace

std::vector<bool> breaks_before(const std::vector<double>& days) {
  std::vector<bool> breaks(days.size(), false);
  if (days.size() < 3) return breaks;
  std::vector<double> steps;
  for (std::size_t i = 1; i < days.size(); ++i) steps.push_back(days[i] - days[i - 1]);
  std::vector<double> sorted = steps;
  std::nth_element(sorted.begin(), sorted.begin() + long(sorted.size() / 2), sorted.end());
  const double median = sorted[sorted.size() / 2];
  // A composite or two not delivered is a gap the curve spans (its fill is drawn); a season
  // without any is not: an Alaska winter between 16-day summers had been a straight line.
  for (std::size_t i = 1; i < days.size(); ++i) breaks[i] = steps[i - 1] > 2.5 * median;
  return breaks;
}

std::string time_series_svg(const std::vector<PlotDate>& dates, const std::string& unit,
                            const std::string& description, int width, int height) {
  double lo = INFINITY, hi = -INFINITY;
  for (const PlotDate& d : dates) {
    for (double v : {d.value - d.sd, d.value + d.sd, d.raw, d.synoptic, d.value})
      if (std::isfinite(v)) lo = std::min(lo, v), hi = std::max(hi, v);
  }
  std::string svg = svg_start(width, height, description);
  if (dates.empty() || !std::isfinite(lo)) return svg + "<text x=\"10\" y=\"20\">no values at this pixel</text></svg>\n";
  const Frame frame(width, height, dates.front().day, dates.back().day, lo, hi);
  std::vector<double> days;
  for (const PlotDate& d : dates) days.push_back(d.day);
  const std::vector<bool> breaks = breaks_before(days);
  const double left = frame.left;
  auto sx = [&](double t) { return frame.x(t); };
  auto sy = [&](double v) { return frame.y(v); };
  svg += frame.axes(unit);
  // +-1 sd band: upper edge forward, lower edge back, over each run of dates with a curve
  std::vector<std::vector<const PlotDate*>> runs(1);
  for (std::size_t i = 0; i < dates.size(); ++i) {
    const PlotDate& d = dates[i];
    if (breaks[i] && !runs.back().empty()) runs.emplace_back();
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
    return broken_line(dates.size(), [&](std::size_t i) { return std::pair(sx(dates[i].day), sy(get(dates[i]))); }, breaks,
                       fmt::format("class=\"{}\" stroke=\"{}\" {}", cls, colour, dash));
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

std::string validation_svg(const ValidationPlot& plot, const std::string& unit, const std::string& description,
                           int width, int height) {
  double lo = INFINITY, hi = -INFINITY;
  for (double v : plot.truth)
    if (std::isfinite(v)) lo = std::min(lo, v), hi = std::max(hi, v);
  for (const auto& [label, values] : plot.curves)
    for (double v : values)
      if (std::isfinite(v)) lo = std::min(lo, v), hi = std::max(hi, v);
  std::string svg = svg_start(width, height + 16, description);
  const std::vector<bool> breaks = breaks_before(plot.days);
  if (plot.days.empty() || !std::isfinite(lo)) return svg + "<text x=\"10\" y=\"20\">no values at this pixel</text></svg>\n";
  Frame frame(width, height + 16, plot.days.front(), plot.days.back(), lo, hi);
  frame.top += 16;  // two legend rows
  svg += frame.axes(unit);
  // Methods in the Okabe-Ito colours not used for the points and not too pale on white (blue,
  // reddish purple, orange, sky blue), then again dashed; baselines grey and dashed.
  static const char* colours[] = {"#0072b2", "#cc79a7", "#e69f00", "#56b4e9"};
  // The legend in rows of 16 px above the plot, wrapping where the next entry would not fit.
  std::string legend;
  double legend_x = frame.left + 4, legend_y = 0;
  auto legend_item = [&](const std::string& mark, const std::string& text) {
    const double entry = 28 + 6.2 * double(text.size());
    if (legend_x + entry > width - frame.right && legend_x > frame.left + 4) legend_x = frame.left + 4, legend_y += 16;
    legend += fmt::format("<g transform=\"translate({:.0f} {:.0f})\">{}<text x=\"20\" y=\"16\">{}</text></g>",
                          legend_x, legend_y, mark, text);
    legend_x += entry;
  };
  const std::string kept = hex(flag_colour(0)), withheld = hex(flag_colour(1));
  legend_item(fmt::format("<circle cx=\"8\" cy=\"12\" r=\"3\" fill=\"{}\"/>", kept), "observed, kept");
  legend_item(fmt::format("<circle cx=\"8\" cy=\"12\" r=\"3.5\" fill=\"none\" stroke=\"{}\" stroke-width=\"1.6\"/>",
                          withheld),
              "withheld (the truth)");
  int method = 0;
  for (const auto& [label, values] : plot.curves) {
    const bool baseline = label.size() >= 8 && label.compare(label.size() - 8, 8, "baseline") == 0;
    const std::string colour = baseline ? "#666666" : colours[method % 4];
    const std::string dash = baseline || method >= 4 ? "stroke-dasharray=\"5 3\"" : "";
    if (!baseline) ++method;
    const std::string attributes = fmt::format("class=\"curve\" stroke=\"{}\" {}", colour, dash);
    svg += broken_line(values.size(), [&](std::size_t i) { return std::pair(frame.x(plot.days[i]), frame.y(values[i])); },
                       breaks, attributes);
    legend_item(fmt::format("<line x1=\"0\" x2=\"16\" y1=\"12\" y2=\"12\" stroke-width=\"2\" {}/>", attributes), label);
  }
  for (std::size_t i = 0; i < plot.days.size(); ++i) {
    if (!std::isfinite(plot.truth[i])) continue;
    if (plot.withheld[i])
      svg += fmt::format("<circle class=\"withheld\" cx=\"{:.1f}\" cy=\"{:.1f}\" r=\"3.5\" fill=\"none\" stroke=\"{}\" "
                         "stroke-width=\"1.6\"/>", frame.x(plot.days[i]), frame.y(plot.truth[i]), withheld);
    else
      svg += fmt::format("<circle class=\"observed\" cx=\"{:.1f}\" cy=\"{:.1f}\" r=\"2.6\" fill=\"{}\"/>",
                         frame.x(plot.days[i]), frame.y(plot.truth[i]), kept);
  }
  svg += "\n<g font-family=\"sans-serif\" font-size=\"11\" fill=\"#333\">" + legend + "</g>\n";
  return svg + "</svg>\n";
}

}  // namespace kalends::detail
