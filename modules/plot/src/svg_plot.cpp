// SVG plots written by hand: axes, nice ticks, log axes, series, legend.
#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>
#include <sstream>

#include "skerry/plot.h"

namespace skerry::plot {
namespace {

std::string num(double v) {
  char b[32];
  std::snprintf(b, sizeof b, "%.2f", v);
  return b;
}

// Heckbert (1990) "nice number": 1, 2, 5 or 10 times a power of ten near x.
double nice_number(double x, bool round) {
  const double e = std::floor(std::log10(x));
  const double f = x / std::pow(10.0, e);
  double nf;
  if (round) nf = f < 1.5 ? 1 : f < 3 ? 2 : f < 7 ? 5 : 10;
  else nf = f <= 1 ? 1 : f <= 2 ? 2 : f <= 5 ? 5 : 10;
  return nf * std::pow(10.0, e);
}

struct Axis {
  double lo, hi;
  bool log;
  double p0, p1;  // pixel positions of lo and hi
  double map(double v) const {
    const double a = log ? std::log10(v) : v, l = log ? std::log10(lo) : lo, h = log ? std::log10(hi) : hi;
    return p0 + (a - l) / (h - l) * (p1 - p0);
  }
  bool ok(double v) const { return std::isfinite(v) && (!log || v > 0); }
};

void data_range(const Plot& p, bool for_x, bool log, double& lo, double& hi) {
  lo = std::numeric_limits<double>::infinity();
  hi = -lo;
  auto take = [&](double v) {
    if (std::isfinite(v) && (!log || v > 0)) { lo = std::min(lo, v); hi = std::max(hi, v); }
  };
  for (const Series& s : p.series) {
    if (for_x) { for (double v : s.x) take(v); continue; }
    for (double v : s.y) take(v);
    if (s.kind == SeriesKind::ErrorPoints) {
      for (double v : s.y_lo) take(v);
      for (double v : s.y_hi) take(v);
    }
    if (s.kind == SeriesKind::Bars && !log) take(0.0);
  }
  for (double v : for_x ? p.v_lines : p.h_lines) take(v);
}

void finish_range(double& lo, double& hi, bool log, std::optional<double> fixed_lo, std::optional<double> fixed_hi) {
  if (!std::isfinite(lo)) { lo = log ? 1 : 0; hi = log ? 10 : 1; }
  if (log) {
    if (hi <= lo) { lo /= 2; hi *= 2; }
    const double d = std::log10(hi / lo) * 0.05;
    lo /= std::pow(10.0, d);
    hi *= std::pow(10.0, d);
  } else {
    if (hi <= lo) { const double m = lo == 0 ? 1 : std::fabs(lo) * 0.1; lo -= m; hi += m; }
    const double d = (hi - lo) * 0.05;
    if (lo != 0) lo -= d;  // keep a zero baseline (histograms) on the axis
    hi += d;
  }
  if (fixed_lo) lo = *fixed_lo;
  if (fixed_hi) hi = *fixed_hi;
  if (!(hi > lo)) hi = lo + 1;
}

}  // namespace

std::string xml_escape(const std::string& s) {
  std::string o;
  o.reserve(s.size());
  for (char c : s) {
    switch (c) {
      case '&': o += "&amp;"; break;
      case '<': o += "&lt;"; break;
      case '>': o += "&gt;"; break;
      case '"': o += "&quot;"; break;
      default: o += c;
    }
  }
  return o;
}

std::vector<double> nice_ticks(double lo, double hi, int target) {
  std::vector<double> t;
  if (!(hi > lo) || !std::isfinite(lo) || !std::isfinite(hi) || target < 2) return t;
  const double range = nice_number(hi - lo, false);
  const double step = nice_number(range / (target - 1), true);
  const double first = std::ceil(lo / step - 1e-9) * step;
  for (double v = first; v <= hi + step * 1e-9; v += step) t.push_back(std::fabs(v) < step * 1e-9 ? 0.0 : v);
  return t;
}

std::vector<double> log_ticks(double lo, double hi) {
  std::vector<double> t;
  if (!(lo > 0) || !(hi > lo)) return t;
  const int e0 = static_cast<int>(std::floor(std::log10(lo))), e1 = static_cast<int>(std::ceil(std::log10(hi)));
  const bool fine = (e1 - e0) <= 2;
  for (int e = e0; e <= e1; ++e) {
    for (double m : fine ? std::vector<double>{1, 2, 5} : std::vector<double>{1}) {
      const double v = m * std::pow(10.0, e);
      if (v >= lo * (1 - 1e-12) && v <= hi * (1 + 1e-12)) t.push_back(v);
    }
  }
  if (t.size() < 2 && (e1 - e0) <= 1) {  // a narrow log range: use linear nice ticks
    t = nice_ticks(lo, hi, 5);
    t.erase(std::remove_if(t.begin(), t.end(), [](double v) { return v <= 0; }), t.end());
  }
  return t;
}

std::string tick_label(double v) {
  if (v == 0) return "0";
  const double a = std::fabs(v);
  char b[32];
  if (a >= 1e-3 && a < 1e5) {
    std::snprintf(b, sizeof b, "%.6g", v);
  } else {
    const int e = static_cast<int>(std::floor(std::log10(a) + 1e-9));
    const double m = v / std::pow(10.0, e);
    if (std::fabs(m - std::round(m)) < 1e-6 && std::fabs(std::round(m) - 1) < 1e-6)
      std::snprintf(b, sizeof b, "1e%d", e);
    else
      std::snprintf(b, sizeof b, "%.3ge%d", m, e);
  }
  return b;
}

std::string render_svg(const Plot& p) {
  const double W = p.width_px, H = p.height_px;
  // The note and the legend sit in a band above the plot area, never over the data.
  bool has_legend = false;
  for (const Series& s : p.series) has_legend = has_legend || !s.label.empty();
  const double band = (has_legend || !p.note.empty()) ? 20 : 0;
  const double ml = 70, mr = 18, mt = (p.title.empty() ? 16 : 34) + band, mb = 52;
  double xlo, xhi, ylo, yhi;
  data_range(p, true, p.x_log, xlo, xhi);
  data_range(p, false, p.y_log, ylo, yhi);
  const bool empty = !std::isfinite(xlo) || !std::isfinite(ylo);
  finish_range(xlo, xhi, p.x_log, p.x_min, p.x_max);
  finish_range(ylo, yhi, p.y_log, p.y_min, p.y_max);
  const Axis ax{xlo, xhi, p.x_log, ml, W - mr};
  const Axis ay{ylo, yhi, p.y_log, H - mb, mt};

  std::ostringstream o;
  o << "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"plot\" id=\"" << xml_escape(p.id) << "\" width=\"" << W
    << "\" height=\"" << H << "\" viewBox=\"0 0 " << W << ' ' << H
    << "\" font-family=\"DejaVu Sans, Verdana, sans-serif\" font-size=\"12\" role=\"img\" aria-label=\""
    << xml_escape(p.title) << "\">\n";
  o << "<rect x=\"0\" y=\"0\" width=\"" << W << "\" height=\"" << H << "\" fill=\"#ffffff\"/>\n";
  if (!p.title.empty())
    o << "<text x=\"" << num(ml) << "\" y=\"20\" font-size=\"14\" font-weight=\"bold\" fill=\"#222\">"
      << xml_escape(p.title) << "</text>\n";
  o << "<defs><clipPath id=\"clip-" << xml_escape(p.id) << "\"><rect x=\"" << num(ml) << "\" y=\"" << num(mt)
    << "\" width=\"" << num(W - ml - mr) << "\" height=\"" << num(H - mt - mb) << "\"/></clipPath></defs>\n";
  o << "<rect x=\"" << num(ml) << "\" y=\"" << num(mt) << "\" width=\"" << num(W - ml - mr) << "\" height=\""
    << num(H - mt - mb) << "\" fill=\"#fbfbf8\" stroke=\"#555\" stroke-width=\"1\"/>\n";

  // Ticks and grid.
  const auto xt = p.x_log ? log_ticks(xlo, xhi) : nice_ticks(xlo, xhi, 6);
  const auto yt = p.y_log ? log_ticks(ylo, yhi) : nice_ticks(ylo, yhi, 6);
  o << "<g class=\"ticks\" stroke=\"#ddd\" stroke-width=\"1\">\n";
  for (double v : xt) o << "<line x1=\"" << num(ax.map(v)) << "\" y1=\"" << num(mt) << "\" x2=\"" << num(ax.map(v)) << "\" y2=\"" << num(H - mb) << "\"/>\n";
  for (double v : yt) o << "<line x1=\"" << num(ml) << "\" y1=\"" << num(ay.map(v)) << "\" x2=\"" << num(W - mr) << "\" y2=\"" << num(ay.map(v)) << "\"/>\n";
  o << "</g>\n<g class=\"tick-labels\" fill=\"#333\">\n";
  for (double v : xt)
    o << "<line x1=\"" << num(ax.map(v)) << "\" y1=\"" << num(H - mb) << "\" x2=\"" << num(ax.map(v)) << "\" y2=\""
      << num(H - mb + 5) << "\" stroke=\"#555\"/><text class=\"xtick\" x=\"" << num(ax.map(v)) << "\" y=\""
      << num(H - mb + 18) << "\" text-anchor=\"middle\">" << tick_label(v) << "</text>\n";
  for (double v : yt)
    o << "<line x1=\"" << num(ml - 5) << "\" y1=\"" << num(ay.map(v)) << "\" x2=\"" << num(ml) << "\" y2=\""
      << num(ay.map(v)) << "\" stroke=\"#555\"/><text class=\"ytick\" x=\"" << num(ml - 8) << "\" y=\""
      << num(ay.map(v) + 4) << "\" text-anchor=\"end\">" << tick_label(v) << "</text>\n";
  o << "</g>\n";
  o << "<text class=\"xlabel\" x=\"" << num((ml + W - mr) / 2) << "\" y=\"" << num(H - 12)
    << "\" text-anchor=\"middle\" fill=\"#222\">" << xml_escape(p.x_label) << "</text>\n";
  o << "<text class=\"ylabel\" transform=\"translate(16," << num((mt + H - mb) / 2)
    << ") rotate(-90)\" text-anchor=\"middle\" fill=\"#222\">" << xml_escape(p.y_label) << "</text>\n";

  o << "<g clip-path=\"url(#clip-" << xml_escape(p.id) << ")\">\n";
  for (double v : p.v_lines)
    if (ax.ok(v)) o << "<line x1=\"" << num(ax.map(v)) << "\" y1=\"" << num(mt) << "\" x2=\"" << num(ax.map(v)) << "\" y2=\"" << num(H - mb) << "\" stroke=\"#444\" stroke-dasharray=\"2 3\"/>\n";
  for (double v : p.h_lines)
    if (ay.ok(v)) o << "<line x1=\"" << num(ml) << "\" y1=\"" << num(ay.map(v)) << "\" x2=\"" << num(W - mr) << "\" y2=\"" << num(ay.map(v)) << "\" stroke=\"#444\" stroke-dasharray=\"2 3\"/>\n";
  std::size_t drawn = 0;
  for (const Series& s : p.series) {
    o << "<g class=\"series\" data-label=\"" << xml_escape(s.label) << "\">\n";
    const std::string dash = s.dashed ? " stroke-dasharray=\"6 4\"" : "";
    if (s.kind == SeriesKind::Line) {
      std::string path;
      bool pen = false;
      for (std::size_t i = 0; i < s.x.size() && i < s.y.size(); ++i) {
        if (!ax.ok(s.x[i]) || !ay.ok(s.y[i])) { pen = false; continue; }
        path += (pen ? " L" : " M") + num(ax.map(s.x[i])) + ' ' + num(ay.map(s.y[i]));
        pen = true;
        ++drawn;
      }
      if (!path.empty())
        o << "<path d=\"" << path << "\" fill=\"none\" stroke=\"" << s.colour << "\" stroke-width=\"" << num(s.line_width_px) << "\"" << dash << "/>\n";
    } else if (s.kind == SeriesKind::Steps || s.kind == SeriesKind::Bars) {
      const double base = ay.log ? ylo : std::max(ylo, 0.0);
      for (std::size_t i = 0; i + 1 < s.x.size() && i < s.y.size(); ++i) {
        if (!ax.ok(s.x[i]) || !ax.ok(s.x[i + 1]) || !std::isfinite(s.y[i])) continue;
        if (ay.log && !(s.y[i] > 0)) continue;
        const double x0 = ax.map(s.x[i]), x1 = ax.map(s.x[i + 1]);
        const double y0 = ay.map(std::max(s.y[i], ylo)), yb = ay.map(base);
        o << "<rect class=\"bar\" x=\"" << num(x0) << "\" y=\"" << num(std::min(y0, yb)) << "\" width=\""
          << num(std::max(x1 - x0 - 0.5, 0.5)) << "\" height=\"" << num(std::fabs(yb - y0)) << "\" fill=\"" << s.colour
          << "\" fill-opacity=\"0.75\" stroke=\"" << s.colour << "\"/>\n";
        ++drawn;
      }
    } else {
      for (std::size_t i = 0; i < s.x.size() && i < s.y.size(); ++i) {
        if (!ax.ok(s.x[i]) || !ay.ok(s.y[i])) continue;
        const double cx = ax.map(s.x[i]), cy = ay.map(s.y[i]);
        if (s.kind == SeriesKind::ErrorPoints && i < s.y_lo.size() && i < s.y_hi.size()) {
          const double lo = ay.ok(s.y_lo[i]) ? ay.map(s.y_lo[i]) : H - mb;
          const double hi = ay.ok(s.y_hi[i]) ? ay.map(s.y_hi[i]) : cy;
          o << "<line x1=\"" << num(cx) << "\" y1=\"" << num(lo) << "\" x2=\"" << num(cx) << "\" y2=\"" << num(hi)
            << "\" stroke=\"" << s.colour << "\" stroke-width=\"1.2\"/>\n";
        }
        o << "<circle cx=\"" << num(cx) << "\" cy=\"" << num(cy) << "\" r=\"" << num(s.point_radius_px)
          << "\" fill=\"" << s.colour << "\" fill-opacity=\"" << (s.kind == SeriesKind::Points ? "0.6" : "1") << "\"/>\n";
        ++drawn;
      }
    }
    o << "</g>\n";
  }
  o << "</g>\n";
  if (empty || drawn == 0)
    o << "<text class=\"nodata\" x=\"" << num((ml + W - mr) / 2) << "\" y=\"" << num((mt + H - mb) / 2)
      << "\" text-anchor=\"middle\" font-size=\"15\" fill=\"#888\">no data</text>\n";
  if (!p.note.empty())
    o << "<text class=\"note\" x=\"" << num(ml) << "\" y=\"" << num(mt - 8) << "\" fill=\"#333\">"
      << xml_escape(p.note) << "</text>\n";
  // Legend: right-aligned entries in the band above the plot area.
  double lx = W - mr;
  for (auto it = p.series.rbegin(); it != p.series.rend(); ++it) {
    const Series& s = *it;
    if (s.label.empty()) continue;
    const double ly = mt - 12;
    o << "<g class=\"legend\"><text x=\"" << num(lx) << "\" y=\"" << num(ly + 4) << "\" text-anchor=\"end\" fill=\"#222\">"
      << xml_escape(s.label) << "</text>";
    const double tw = 7.0 * static_cast<double>(s.label.size());  // ~ advance of a 12 px sans-serif character
    const double sx = lx - tw - 22;
    if (s.kind == SeriesKind::Line)
      o << "<line x1=\"" << num(sx) << "\" y1=\"" << num(ly) << "\" x2=\"" << num(sx + 18) << "\" y2=\"" << num(ly)
        << "\" stroke=\"" << s.colour << "\" stroke-width=\"2\"" << (s.dashed ? " stroke-dasharray=\"6 4\"" : "") << "/>";
    else
      o << "<rect x=\"" << num(sx + 4) << "\" y=\"" << num(ly - 5) << "\" width=\"10\" height=\"10\" fill=\"" << s.colour << "\"/>";
    o << "</g>\n";
    lx = sx - 14;
  }
  o << "</svg>\n";
  return o.str();
}

}  // namespace skerry::plot
