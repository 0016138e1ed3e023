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
// usage: bench_match [--quick]   (--quick: 10^5 and 10^6 rows only)
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

}  // namespace

int main(int argc, char** argv) {
  const bool quick = argc > 1 && std::strcmp(argv[1], "--quick") == 0;
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
