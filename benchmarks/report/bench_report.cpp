// Benchmark: `skerry report` against `skerry extract` on the same image (issue: the
// report must cost less than the extraction). An 8192 x 8192 simulated image with
// about 20,000 sources (the same sky and settings as bench_extract, whose cached
// image it reuses when the work folder is shared), default settings. Each command
// runs as a child process (peak RSS by wait4 / ru_maxrss), with the same thread
// count. Prints wall time, CPU time and peak RSS of both, their ratios, and the size
// of the page. Prints figures only; asserts nothing.
//
//   bench_report [work_dir=/tmp/skerry-bench-extract] [size=8192] [sources=20000] [threads=2]
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <string>
#include <vector>

#include "io/fits_image.h"
#include "io/wcs.h"
#include "skerry/simulate.h"

using namespace skerry;
namespace fs = std::filesystem;

namespace {

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

// The image of bench_extract (same seed, sky and noise), so that both benchmarks share it.
void make_image(const std::string& path, long n, std::size_t count) {
  const Beam beam{7.5, 6.0, 20.0};
  GridSpec g;
  g.nx = g.ny = n;
  g.projection = "SIN";
  g.crval1_deg = 201.25;  // Lanternfish Field
  g.crval2_deg = -38.6;
  g.crpix1 = g.crpix2 = 0.5 * (n + 1);
  g.cdelt1_deg = -1.5 / 3600.0;
  g.cdelt2_deg = 1.5 / 3600.0;
  g.beam = beam;
  g.freq_hz = 1.4e9;
  SkyImage like = make_sky_image(g, ImageF::Zero(n, n), "Lanternfish Field (simulated)");
  sim::SkyModelOptions so;
  so.footprint = like.wcs.get();
  so.footprint_nx = n;
  so.footprint_ny = n;
  so.count = count;
  so.s_min_jy = 1e-4;
  so.s_max_jy = 0.1;
  so.slope = 1.8;
  so.resolved_fraction = 0.2;
  so.unit_beam = beam;
  const sim::SkyModel model = sim::draw_sky_model(so, 2026);
  sim::BandOptions bo;
  bo.nx = bo.ny = n;
  bo.beam = beam;
  bo.rms_jy_per_beam = 2e-5;
  sim::BandImage band = sim::simulate_band(model, *like.wcs, bo, 2026);
  write_fits_image(path, band.image, like);
  std::printf("simulated %ld x %ld image with %zu sources -> %s\n", n, n, model.sources.size(), path.c_str());
}

struct Cost { bool ok = false; double wall = 0, cpu = 0, rss = 0; };

Cost run(const std::vector<std::string>& args) {
  std::vector<char*> argv{const_cast<char*>(SKERRY_BINARY)};
  for (const auto& a : args) argv.push_back(const_cast<char*>(a.c_str()));
  argv.push_back(nullptr);
  std::fflush(stdout);
  const double t0 = now_s();
  const pid_t pid = fork();
  if (pid == 0) {
    std::freopen("/dev/null", "w", stdout);
    execv(SKERRY_BINARY, argv.data());
    _exit(127);
  }
  int status = 0;
  rusage ru{};
  wait4(pid, &status, 0, &ru);
  Cost c;
  c.wall = now_s() - t0;
  c.ok = WIFEXITED(status) && WEXITSTATUS(status) == 0;
  c.cpu = ru.ru_utime.tv_sec + ru.ru_stime.tv_sec + 1e-6 * (ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
  c.rss = static_cast<double>(ru.ru_maxrss) * 1024.0;
  return c;
}

}  // namespace

int main(int argc, char** argv) {
  const std::string work = argc > 1 ? argv[1] : "/tmp/skerry-bench-extract";
  const long n = argc > 2 ? std::atol(argv[2]) : 8192;
  const std::size_t count = argc > 3 ? static_cast<std::size_t>(std::atol(argv[3])) : 20000;
  const std::string threads = argc > 4 ? argv[4] : "2";
  fs::create_directories(work);
  const std::string image = work + "/field_" + std::to_string(n) + "_" + std::to_string(count) + ".fits";
  if (!fs::exists(image)) make_image(image, n, count);
  const std::string out = work + "/report_run";
  fs::remove_all(out);
  const Cost e = run({"extract", image, "--out", out, "--threads", threads});
  if (!e.ok) { std::printf("skerry extract failed\n"); return 1; }
  const Cost r = run({"report", out, "--threads", threads});
  if (!r.ok) { std::printf("skerry report failed\n"); return 1; }
  const fs::path page = fs::path(out) / (fs::path(image).stem().string() + ".report.html");
  std::printf("%ld x %ld image, %s threads\n", n, n, threads.c_str());
  std::printf("  extract: %7.2f s wall, %7.2f s CPU, peak RSS %6.0f MB\n", e.wall, e.cpu, e.rss / 1e6);
  std::printf("  report:  %7.2f s wall, %7.2f s CPU, peak RSS %6.0f MB\n", r.wall, r.cpu, r.rss / 1e6);
  std::printf("  report / extract: CPU %.2f, peak RSS %.2f; page %.1f MB\n", r.cpu / e.cpu, r.rss / e.rss,
              static_cast<double>(fs::file_size(page)) / 1e6);
  return 0;
}
