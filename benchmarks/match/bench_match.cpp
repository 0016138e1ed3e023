// Cross-match benchmark (prints figures; not a test).
//
// Two random catalogues of 10^6 and of 10^7 rows, uniform on the sphere over a
// 400 deg^2 field centred on the Lanternfish Field (RA 201.25, Dec -38.6),
// radius 5 arcsec, nearest-neighbour mode: index build and query times,
// matches per second and peak RSS (getrusage ru_maxrss) for 1 and 2 threads,
// each configuration in its own child process so that its peak RSS is its own.
// Then the 10^6 match end to end including file reading (both catalogues
// written to FITS and to CSV first) by skerry and by astropy's
// SkyCoord.match_to_catalog_sky (python3 subprocess, same files), and the ratio.
//
// Error-scaled exclusive (one-to-one) match: two 10^6-row catalogues over
// 400 deg^2, 60 % of the objects in both, per-source errors 0.7-1.3" (A) and
// 1.4-2.6" (B): F1, rows used twice and the time including reading both FITS
// files, for skerry (non-exclusive and exclusive) and for an astropy script
// (search_around_sky, the same chi-square criterion d < k, greedy one-to-one by
// increasing d in Python), side by side.
// Likelihood ratio: 4 x 10^4 radio sources (errors 0.3-1.5") against 3 x 10^6
// optical objects (10^5 per deg^2 over 30 deg^2, 75 % of the radio sources
// with a counterpart, simulated by sim::draw_radio_optical_field): time for 1
// and 2 threads, Q0 against the truth, calibration of the reliabilities, and
// precision / recall at R > 0.8 next to the nearest-neighbour baseline.
//
// usage: bench_match [--quick] [--only nearest|exclusive|lr]
//   (--quick: 10^5 and 10^6 rows only, smaller exclusive and LR fields)
#include <sys/resource.h>
#include <sys/wait.h>
#include <tbb/global_control.h>
#include <unistd.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <functional>
#include <fstream>
#include <random>
#include <string>
#include <vector>

#include "io/table_io.h"
#include "skerry/crossmatch.h"
#include "skerry/likelihood_ratio.h"
#include "skerry/simulate.h"
#include "skerry/sky.h"
#include "skerry/table.h"

using namespace skerry;
namespace fs = std::filesystem;

namespace {

constexpr double kPi = 3.14159265358979323846;
constexpr double kD2R = kPi / 180.0;

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

/// User + system CPU time of this process [s]: on a shared machine the wall
/// time also counts waiting for a core; this does not.
double cpu_s() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return static_cast<double>(u.ru_utime.tv_sec + u.ru_stime.tv_sec) +
         1e-6 * static_cast<double>(u.ru_utime.tv_usec + u.ru_stime.tv_usec);
}

double peak_rss_mib() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return static_cast<double>(u.ru_maxrss) / 1024.0;  // ru_maxrss is in KiB on Linux
}

/// Uniform on the sphere: Dec in [-48.6, -28.6], RA width chosen so that the
/// area is 400 deg^2: W (sin d1 - sin d0) = 400 (pi/180)^2.
SkyPositions make_catalogue(std::size_t n, std::uint64_t seed) {
  const double d0 = -48.6 * kD2R, d1 = -28.6 * kD2R;
  const double s0 = std::sin(d0), s1 = std::sin(d1);
  const double width = 400.0 * kD2R * kD2R / (s1 - s0);  // rad
  std::mt19937_64 g(seed);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  SkyPositions p;
  p.ra_deg.resize(n);
  p.dec_deg.resize(n);
  for (std::size_t i = 0; i < n; ++i) {
    p.ra_deg[i] = 201.25 + (u(g) - 0.5) * width / kD2R;
    p.dec_deg[i] = std::asin(s0 + (s1 - s0) * u(g)) / kD2R;
  }
  return p;
}

void run_config(std::size_t n, int threads) {
  tbb::global_control gc(tbb::global_control::max_allowed_parallelism, static_cast<std::size_t>(threads));
  SkyPositions a = make_catalogue(n, 1), b = make_catalogue(n, 2);
  MatchOptions o;
  o.radius_arcsec = 5.0;
  SkyPositions none;
  // Build only: an empty A against B builds B's index and queries nothing.
  double t0 = now_s();
  const double c0 = cpu_s();
  (void)match_catalogues(none, b, o);
  const double build = now_s() - t0;
  t0 = now_s();
  MatchResult r = match_catalogues(a, b, o);
  const double total = now_s() - t0;
  const double cpu = cpu_s() - c0;
  std::printf("  N = %-9zu threads = %d  build %.2f s  query %.2f s  total %.2f s wall (%.2f s CPU, build+match)  "
              "matches %zu  %.3g matches/s  %.3g queries/s  peak RSS %.0f MiB\n",
              n, threads, build, total - build, total, cpu, r.pairs.size(),
              static_cast<double>(r.pairs.size()) / total, static_cast<double>(n) / total, peak_rss_mib());
  std::fflush(stdout);
}

void in_child(const std::function<void()>& fn) {
  std::fflush(stdout);
  pid_t pid = fork();
  if (pid == 0) {
    fn();
    std::fflush(stdout);
    _exit(0);
  }
  int st = 0;
  waitpid(pid, &st, 0);
}

Table as_table(const SkyPositions& p) {
  Table t;
  t.name = "bench";
  t.add_f64("ra_deg", "deg", "pos.eq.ra;meta.main", "Right ascension (ICRS)", p.ra_deg);
  t.add_f64("dec_deg", "deg", "pos.eq.dec;meta.main", "Declination (ICRS)", p.dec_deg);
  return t;
}


// ---- error-scaled exclusive ---------------------------------------------------------

/// A: n rows, B: n rows, the first 0.6 n of each the same objects (row i of A
/// is row i of B); uniform over 400 deg^2; circular per-source errors.
void make_error_pair(std::size_t n, SkyPositions& a, SkyPositions& b) {
  SkyPositions t = make_catalogue(n, 3), u = make_catalogue(n, 4);
  std::mt19937_64 g(5);
  std::uniform_real_distribution<double> uni(0.0, 1.0);
  std::normal_distribution<double> z(0.0, 1.0);
  const std::size_t common = n * 6 / 10;
  auto measure = [&](SkyPositions& c, double ra, double dec, double lo, double hi) {
    const double e = lo + (hi - lo) * uni(g);
    double r, d;
    gnomonic_inverse(ra, dec, e * z(g) / 206264.80624709636, e * z(g) / 206264.80624709636, r, d);
    c.ra_deg.push_back(r);
    c.dec_deg.push_back(d);
    c.err_east_arcsec.push_back(e);
    c.err_north_arcsec.push_back(e);
  };
  for (std::size_t i = 0; i < n; ++i) measure(a, t.ra_deg[i], t.dec_deg[i], 0.7, 1.3);
  for (std::size_t i = 0; i < n; ++i)
    if (i < common) measure(b, t.ra_deg[i], t.dec_deg[i], 1.4, 2.6);
    else measure(b, u.ra_deg[i], u.dec_deg[i], 1.4, 2.6);
}

Table as_error_table(const SkyPositions& p) {
  Table t = as_table(p);
  t.add_f64("ra_err_arcsec", "arcsec", "stat.error;pos.eq.ra", "error of RA cos(Dec)", p.err_east_arcsec);
  t.add_f64("dec_err_arcsec", "arcsec", "stat.error;pos.eq.dec", "error of Dec", p.err_north_arcsec);
  return t;
}

void bench_exclusive(bool quick) {
  const std::size_t n = quick ? 100000 : 1000000;
  const std::size_t common = n * 6 / 10;
  fs::path dir = fs::temp_directory_path() / ("skerry_bench_excl_" + std::to_string(getpid()));
  fs::create_directories(dir);
  {
    SkyPositions a, b;
    make_error_pair(n, a, b);
    write_table(as_error_table(a), (dir / "a.fits").string());
    write_table(as_error_table(b), (dir / "b.fits").string());
  }
  std::printf("\nError-scaled matching, %zu x %zu rows (%zu in common) over 400 deg^2, errors 0.7-1.3\" and "
              "1.4-2.6\", d < k(p = 0.997) = 3.409, radius 12\"; FITS reading included, 2 threads:\n",
              n, n, common);
  for (int variant : {0, 1, 2}) {
    const bool excl = variant > 0, by_rel = variant == 2;
    in_child([&] {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 2);
      const double t0 = now_s(), c0 = cpu_s();
      Table ta = read_table((dir / "a.fits").string());
      Table tb = read_table((dir / "b.fits").string());
      SkyPositions a, b;
      a.ra_deg = ta.at("ra_deg").f64;
      a.dec_deg = ta.at("dec_deg").f64;
      a.err_east_arcsec = ta.at("ra_err_arcsec").f64;
      a.err_north_arcsec = ta.at("dec_err_arcsec").f64;
      b.ra_deg = tb.at("ra_deg").f64;
      b.dec_deg = tb.at("dec_deg").f64;
      b.err_east_arcsec = tb.at("ra_err_arcsec").f64;
      b.err_north_arcsec = tb.at("dec_err_arcsec").f64;
      MatchOptions o;
      o.mode = MatchMode::ErrorAware;
      o.radius_arcsec = 12.0;
      o.exclusive = excl;
      if (by_rel) o.exclusive_order = ExclusiveOrder::Reliability;
      MatchResult r = match_catalogues(a, b, o);
      const double t = now_s() - t0, cpu = cpu_s() - c0;
      std::size_t tp = 0, dup = 0;
      std::vector<char> used(n, 0);
      for (const auto& q : r.pairs) {
        tp += q.a == q.b && static_cast<std::size_t>(q.a) < common;
        dup += used[static_cast<std::size_t>(q.b)]++ ? 1 : 0;
      }
      const double prec = static_cast<double>(tp) / static_cast<double>(r.pairs.size());
      const double rec = static_cast<double>(tp) / static_cast<double>(common);
      std::printf("  skerry  %-25s total %.2f s wall, %.2f s CPU  pairs %zu  precision %.4f  recall %.4f  F1 %.4f  B rows used twice %zu  peak RSS %.0f MiB\n",
                  by_rel ? "exclusive by reliability" : excl ? "exclusive by d" : "non-exclusive", t, cpu, r.pairs.size(), prec, rec, 2 * prec * rec / (prec + rec),
                  dup, peak_rss_mib());
      if (by_rel) std::printf("    (Q0 %.4f estimated, true %.4f; R > %.2f)\n", r.q0, static_cast<double>(common) / static_cast<double>(n), o.min_reliability);
      if (excl) std::ofstream(dir / (by_rel ? "skerry_rel.txt" : "skerry.txt")) << t << " " << cpu << "\n";
    });
  }
  std::ofstream(dir / "excl.py") << R"PY(
import sys, time, resource
import numpy as np
from astropy.table import Table
from astropy.coordinates import SkyCoord
import astropy.units as u
d, common = sys.argv[1], int(sys.argv[2])
t0 = time.perf_counter()
ru0 = resource.getrusage(resource.RUSAGE_SELF); cpu0 = ru0.ru_utime + ru0.ru_stime
a = Table.read(d + '/a.fits'); b = Table.read(d + '/b.fits')
ca = SkyCoord(np.asarray(a['ra_deg']) * u.deg, np.asarray(a['dec_deg']) * u.deg)
cb = SkyCoord(np.asarray(b['ra_deg']) * u.deg, np.asarray(b['dec_deg']) * u.deg)
# cb.search_around_sky(ca, r) returns (index into ca, index into cb, separation, distance)
ia, ib, sep, _ = cb.search_around_sky(ca, 12 * u.arcsec)
dra, ddec = ca[ia].spherical_offsets_to(cb[ib])
ve = np.asarray(a['ra_err_arcsec'])[ia] ** 2 + np.asarray(b['ra_err_arcsec'])[ib] ** 2
vn = np.asarray(a['dec_err_arcsec'])[ia] ** 2 + np.asarray(b['dec_err_arcsec'])[ib] ** 2
dn = np.sqrt(dra.arcsec ** 2 / ve + ddec.arcsec ** 2 / vn)
k = np.sqrt(-2 * np.log(1 - 0.997))
keep = dn < k
ia, ib, dn = ia[keep], ib[keep], dn[keep]
order = np.argsort(dn, kind='stable')
ua = np.zeros(len(a), bool); ub = np.zeros(len(b), bool)
pa, pb = [], []
for o in order:
    x, y = ia[o], ib[o]
    if ua[x] or ub[y]: continue
    ua[x] = ub[y] = True
    pa.append(x); pb.append(y)
t = time.perf_counter() - t0
ru = resource.getrusage(resource.RUSAGE_SELF)
cpu = ru.ru_utime + ru.ru_stime - cpu0
pa = np.array(pa); pb = np.array(pb)
tp = int(((pa == pb) & (pa < common)).sum())
prec = tp / len(pa); rec = tp / common
print('  astropy exclusive     total %.2f s wall, %.2f s CPU  pairs %d  precision %.4f  recall %.4f  F1 %.4f  B rows used twice %d  peak RSS %.0f MiB'
      % (t, cpu, len(pa), prec, rec, 2 * prec * rec / (prec + rec), len(pb) - len(np.unique(pb)),
         resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024))
open(d + '/astropy.txt', 'w').write('%r %r\n' % (t, cpu))
)PY";
  std::fflush(stdout);
  const std::string cmd = "/usr/bin/python3 " + (dir / "excl.py").string() + " " + dir.string() + " " + std::to_string(common);
  if (std::system(cmd.c_str()) != 0) std::printf("  astropy: failed to run\n");
  double ta = 0, ca = 0;
  std::ifstream(dir / "astropy.txt") >> ta >> ca;
  for (const char* which : {"skerry.txt", "skerry_rel.txt"}) {
    double ts = 0, cs = 0;
    std::ifstream(dir / which) >> ts >> cs;
    if (ts > 0 && ta > 0)
      std::printf("  ratio astropy / skerry (exclusive by %s, FITS reading included): %.1f x wall, %.1f x CPU\n",
                  which == std::string("skerry.txt") ? "d" : "reliability", ta / ts, ca / cs);
  }
  fs::remove_all(dir);
}

// ---- likelihood ratio ----------------------------------------------------------------------

void bench_lr(bool quick) {
  const std::size_t n_radio = quick ? 4000 : 40000;
  const double half = quick ? 0.866 : 2.739;  // 3 or 30 deg^2 at 1e5 per deg^2
  sim::CounterpartOptions co;
  co.density_deg2 = 1e5;
  co.fraction = 0.75;
  double t0 = now_s();
  sim::RadioOpticalField f = sim::draw_radio_optical_field(n_radio, 201.25, -38.6, half, 0.05, 0.3, 1.5, co, 2026);
  SkyPositions a, b;
  a.ra_deg = f.radio_ra_deg;
  a.dec_deg = f.radio_dec_deg;
  a.err_east_arcsec = a.err_north_arcsec = f.radio_err_arcsec;
  b.ra_deg = f.optical.ra_deg;
  b.dec_deg = f.optical.dec_deg;
  b.err_east_arcsec = b.err_north_arcsec = f.optical.err_arcsec;
  std::size_t with = 0;
  for (auto t : f.true_counterpart) with += t >= 0;
  std::printf("\nLikelihood ratio: %zu radio sources (errors 0.3-1.5\") against %zu optical objects (1e5 per deg^2, "
              "%.1f %% with a counterpart; simulated in %.1f s), radius 6\":\n",
              n_radio, b.size(), 100.0 * static_cast<double>(with) / static_cast<double>(n_radio), now_s() - t0);
  LikelihoodRatioOptions o;
  o.radius_arcsec = 6.0;
  for (int th : {1, 2})
    in_child([&] {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, static_cast<std::size_t>(th));
      const double t1 = now_s(), c1 = cpu_s();
      LikelihoodRatioResult r = likelihood_ratio_match(a, b, f.optical.mag, o);
      std::printf("  threads = %d  %.2f s wall (%.2f s CPU)  candidates %zu  peak RSS %.0f MiB\n", th, now_s() - t1,
                  cpu_s() - c1, r.candidates.size(), peak_rss_mib());
    });
  LikelihoodRatioResult r = likelihood_ratio_match(a, b, f.optical.mag, o);
  std::printf("  Q0 estimated %.4f (fit rms %.4f), true %.4f\n", r.q0, r.q0_fit_rms,
              static_cast<double>(with) / static_cast<double>(n_radio));
  std::printf("  calibration (candidates in bins of reported R with >= 50 pairs):\n");
  std::vector<double> sr(10, 0);
  std::vector<std::size_t> nn(10, 0), nt(10, 0);
  for (const auto& c : r.candidates) {
    const auto k = static_cast<std::size_t>(std::min(9.0, std::floor(c.reliability * 10)));
    sr[k] += c.reliability;
    ++nn[k];
    nt[k] += f.true_counterpart[static_cast<std::size_t>(c.a)] == c.b;
  }
  for (std::size_t k = 0; k < 10; ++k)
    if (nn[k] >= 50)
      std::printf("    R in [%.1f, %.1f)  n %7zu  mean R %.3f  fraction true %.3f  difference %+.3f\n", 0.1 * k,
                  0.1 * (k + 1), nn[k], sr[k] / nn[k], static_cast<double>(nt[k]) / nn[k],
                  static_cast<double>(nt[k]) / nn[k] - sr[k] / nn[k]);
  std::size_t sel = 0, sel_true = 0;
  for (const auto& c : r.candidates)
    if (c.rank == 1 && c.reliability > 0.8) {
      ++sel;
      sel_true += f.true_counterpart[static_cast<std::size_t>(c.a)] == c.b;
    }
  std::printf("  likelihood ratio, best candidate with R > 0.8: %zu identified, precision %.4f, recall %.4f\n", sel,
              static_cast<double>(sel_true) / sel, static_cast<double>(sel_true) / with);
  for (double rad : {1.0, 2.0, 3.0, 6.0}) {
    MatchOptions mo;
    mo.radius_arcsec = rad;
    MatchResult m = match_catalogues(a, b, mo);
    std::size_t tp = 0;
    for (const auto& q : m.pairs) tp += f.true_counterpart[static_cast<std::size_t>(q.a)] == q.b;
    std::printf("  nearest neighbour within %.0f\": %zu pairs, precision %.4f, recall %.4f\n", rad, m.pairs.size(),
                static_cast<double>(tp) / m.pairs.size(), static_cast<double>(tp) / with);
  }
}

}  // namespace

int main(int argc, char** argv) {
  bool quick = false;
  std::string only;
  for (int i = 1; i < argc; ++i) {
    if (std::strcmp(argv[i], "--quick") == 0) quick = true;
    else if (std::strcmp(argv[i], "--only") == 0 && i + 1 < argc) only = argv[++i];
    else {
      std::fprintf(stderr, "usage: bench_match [--quick] [--only nearest|exclusive|lr]\n");
      return 2;
    }
  }
  if (only == "exclusive" || only.empty()) bench_exclusive(quick);
  if (only == "lr" || only.empty()) bench_lr(quick);
  if (!only.empty() && only != "nearest") return 0;
  std::printf("Cross-match benchmark: uniform random catalogues over 400 deg^2, radius 5 arcsec, nearest mode\n");
  std::printf("(%ld cores online; timings are wall clock)\n", sysconf(_SC_NPROCESSORS_ONLN));
  std::vector<std::size_t> sizes = quick ? std::vector<std::size_t>{100000, 1000000}
                                         : std::vector<std::size_t>{1000000, 10000000};
  for (std::size_t n : sizes)
    for (int th : {1, 2}) in_child([&] { run_config(n, th); });

  // End to end with file reading, 10^6 x 10^6, against astropy.
  const std::size_t n = quick ? 100000 : 1000000;
  fs::path dir = fs::temp_directory_path() / ("skerry_bench_match_" + std::to_string(getpid()));
  fs::create_directories(dir);
  {
    SkyPositions a = make_catalogue(n, 1), b = make_catalogue(n, 2);
    for (const char* ext : {".fits", ".csv"}) {
      write_table(as_table(a), (dir / (std::string("a") + ext)).string());
      write_table(as_table(b), (dir / (std::string("b") + ext)).string());
    }
  }
  std::printf("\nEnd to end %zu x %zu including reading both files (2 threads):\n", n, n);
  for (const char* ext : {".fits", ".csv"}) {
    in_child([&] {
      tbb::global_control gc(tbb::global_control::max_allowed_parallelism, 2);
      const double t0 = now_s();
      Table ta = read_table((dir / (std::string("a") + ext)).string());
      Table tb = read_table((dir / (std::string("b") + ext)).string());
      const double t_read = now_s() - t0;
      SkyPositions a, b;
      a.ra_deg = ta.at("ra_deg").f64;
      a.dec_deg = ta.at("dec_deg").f64;
      b.ra_deg = tb.at("ra_deg").f64;
      b.dec_deg = tb.at("dec_deg").f64;
      MatchOptions o;
      o.radius_arcsec = 5.0;
      MatchResult r = match_catalogues(a, b, o);
      const double t = now_s() - t0;
      std::printf("  skerry  %-5s read %.2f s  total %.2f s  matches %zu  peak RSS %.0f MiB\n", ext, t_read, t,
                  r.pairs.size(), peak_rss_mib());
      std::ofstream(dir / (std::string("skerry") + ext + ".txt")) << t << "\n";
    });
  }
  std::ofstream(dir / "nn.py") << R"PY(
import sys, time, resource
t0 = time.perf_counter()
from astropy.table import Table
from astropy.coordinates import SkyCoord
import astropy.units as u
t_import = time.perf_counter() - t0
d, ext = sys.argv[1], sys.argv[2]
t0 = time.perf_counter()
fmt = {'format': 'ascii.csv'} if ext == '.csv' else {}
a = Table.read(d + '/a' + ext, **fmt); b = Table.read(d + '/b' + ext, **fmt)
t_read = time.perf_counter() - t0
import numpy as np
ca = SkyCoord(np.asarray(a['ra_deg']) * u.deg, np.asarray(a['dec_deg']) * u.deg); cb = SkyCoord(np.asarray(b['ra_deg']) * u.deg, np.asarray(b['dec_deg']) * u.deg)
idx, d2d, _ = ca.match_to_catalog_sky(cb)
n = int((d2d.arcsec <= 5.0).sum())
t = time.perf_counter() - t0
print('  astropy %-5s read %.2f s  total %.2f s  matches %d  peak RSS %.0f MiB  (import %.2f s not counted)'
      % (ext, t_read, t, n, resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, t_import))
open(d + '/astropy' + ext + '.txt', 'w').write('%r\n' % t)
)PY";
  for (const char* ext : {".fits", ".csv"}) {
    std::fflush(stdout);
    const std::string cmd = "/usr/bin/python3 " + (dir / "nn.py").string() + " " + dir.string() + " " + ext;
    if (std::system(cmd.c_str()) != 0) std::printf("  astropy %s: failed to run\n", ext);
  }
  for (const char* ext : {".fits", ".csv"}) {
    double ts = 0, ta = 0;
    std::ifstream(dir / (std::string("skerry") + ext + ".txt")) >> ts;
    std::ifstream(dir / (std::string("astropy") + ext + ".txt")) >> ta;
    if (ts > 0 && ta > 0) std::printf("  ratio astropy / skerry (%s, file reading included): %.1f x\n", ext, ta / ts);
  }
  fs::remove_all(dir);
  return 0;
}
