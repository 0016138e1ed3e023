// Helpers shared by the report's sections (report_util.h).
#include "report/report_util.h"

#include <algorithm>
#include <cmath>
#include <cstdio>
#include <limits>

namespace skerry::report_util {

namespace {
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();
}

std::string fmt(const char* f, double v) {
  char b[64];
  std::snprintf(b, sizeof b, f, v);
  return b;
}

std::vector<double> column(const Table& t, const std::string& name) {
  const Column* c = t.find(name);
  std::vector<double> v;
  if (!c) return std::vector<double>(t.rows(), kNaN);
  if (c->type == ColumnType::Float64) return c->f64;
  if (c->type == ColumnType::Int64) for (auto x : c->i64) v.push_back(static_cast<double>(x));
  else v.assign(t.rows(), kNaN);
  return v;
}

double median(std::vector<double> v) {
  v.erase(std::remove_if(v.begin(), v.end(), [](double x) { return !std::isfinite(x); }), v.end());
  if (v.empty()) return kNaN;
  std::sort(v.begin(), v.end());
  const std::size_t n = v.size();
  return n % 2 ? v[n / 2] : 0.5 * (v[n / 2 - 1] + v[n / 2]);
}

void histogram(const std::vector<double>& v, int nb, std::vector<double>& edges, std::vector<double>& counts,
               double lo, double hi) {
  edges.clear();
  counts.clear();
  double a = std::numeric_limits<double>::infinity(), b = -a;
  for (double x : v) if (std::isfinite(x)) { a = std::min(a, x); b = std::max(b, x); }
  if (std::isfinite(lo)) a = lo;
  if (std::isfinite(hi)) b = hi;
  if (!(b >= a) || !std::isfinite(a)) return;
  if (b == a) { a -= 0.5; b += 0.5; }
  for (int i = 0; i <= nb; ++i) edges.push_back(a + (b - a) * i / nb);
  counts.assign(static_cast<std::size_t>(nb), 0.0);
  for (double x : v) {
    if (!std::isfinite(x) || x < a || x > b) continue;
    int k = static_cast<int>((x - a) / (b - a) * nb);
    k = std::clamp(k, 0, nb - 1);
    counts[static_cast<std::size_t>(k)] += 1;
  }
}

std::string figure(const std::string& svg, const std::string& caption) {
  return "<figure class=\"plotbox\">" + svg + "<figcaption>" + caption + "</figcaption></figure>\n";
}

}  // namespace skerry::report_util
