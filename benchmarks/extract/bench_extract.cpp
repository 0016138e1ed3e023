// Benchmark: `skerry extract` end to end on an 8192 x 8192 simulated image with
// about 20,000 sources (the simulator's sky: power-law flux densities, 20 %
// resolved, beam-correlated noise), default settings: both noise passes,
// residual and model images, maps, all three table formats.
//
// The image is simulated once (cached in the work folder); then for 1 and 2
// threads `skerry extract` runs as a child process, so that its peak RSS
// (wait4 / ru_maxrss) covers only the extraction. Prints: end-to-end wall time
// (read to every output written), the per-stage times of the run record,
// components fitted per second (fit stage), cores used (CPU / wall), peak RSS
// beside the float32 image size, and the bytes written (all files; the maps).
// Prints figures only; asserts nothing.
//
//   bench_extract [work_dir=/tmp/skerry-bench-extract] [size=8192] [sources=20000]
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <fstream>
#include <nlohmann/json.hpp>
#include <sstream>
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
  so.s_min_jy = 1e-4;  // 5 sigma
  so.s_max_jy = 0.1;
  so.slope = 1.8;
  so.resolved_fraction = 0.2;
  so.unit_beam = beam;
  const double t0 = now_s();
  const sim::SkyModel model = sim::draw_sky_model(so, 2026);
  sim::BandOptions bo;
  bo.nx = bo.ny = n;
  bo.beam = beam;
  bo.rms_jy_per_beam = 2e-5;
  sim::BandImage band = sim::simulate_band(model, *like.wcs, bo, 2026);
  write_fits_image(path, band.image, like);
  std::printf("simulated %ld x %ld image with %zu sources in %.1f s -> %s\n", n, n, model.sources.size(),
              now_s() - t0, path.c_str());
}

}  // namespace

int main(int argc, char** argv) {
  const std::string work = argc > 1 ? argv[1] : "/tmp/skerry-bench-extract";
  const long n = argc > 2 ? std::atol(argv[2]) : 8192;
  const std::size_t count = argc > 3 ? static_cast<std::size_t>(std::atol(argv[3])) : 20000;
  fs::create_directories(work);
  const std::string image = work + "/field_" + std::to_string(n) + "_" + std::to_string(count) + ".fits";
  if (!fs::exists(image)) make_image(image, n, count);
  const double image_bytes = 4.0 * static_cast<double>(n) * static_cast<double>(n);
  std::printf("float32 image: %.1f MB\n", image_bytes / 1e6);

  for (int threads : {1, 2}) {
    const std::string out = work + "/out" + std::to_string(threads);
    fs::remove_all(out);
    const std::string th = std::to_string(threads);
    const double t0 = now_s();
    std::fflush(stdout);
    const pid_t pid = fork();
    if (pid == 0) {
      std::freopen("/dev/null", "w", stdout);
      execl(SKERRY_BINARY, SKERRY_BINARY, "extract", image.c_str(), "--out", out.c_str(), "--threads", th.c_str(),
            static_cast<char*>(nullptr));
      _exit(127);
    }
    int status = 0;
    rusage ru{};
    wait4(pid, &status, 0, &ru);
    const double wall = now_s() - t0;
    if (!WIFEXITED(status) || WEXITSTATUS(status) != 0) {
      std::printf("threads %d: skerry extract failed (status %d)\n", threads, status);
      continue;
    }
    const double rss = static_cast<double>(ru.ru_maxrss) * 1024.0;
    const double cpu = ru.ru_utime.tv_sec + ru.ru_stime.tv_sec + 1e-6 * (ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
    std::ifstream in(out + "/" + fs::path(image).stem().string() + ".run.json");
    const auto j = nlohmann::json::parse(in);
    std::uintmax_t written = 0, maps = 0;
    for (const auto& e : fs::directory_iterator(out)) {
      if (!e.is_regular_file()) continue;
      written += e.file_size();
      if (e.path().filename().string().ends_with("_map.fits")) maps += e.file_size();
    }
    std::printf("\nthreads %d: end-to-end %.2f s wall (process, incl. start-up), CPU %.2f s = %.2f cores; "
                "peak RSS %.0f MB = %.2f x image; written %.1f MB (maps %.1f MB, as output.map_storage's default)\n",
                threads, wall, cpu, cpu / wall, rss / 1e6, rss / image_bytes, written / 1e6, maps / 1e6);
    std::printf("  islands %lld, components %lld, sources %lld\n", j["counts"]["islands"].get<long long>(),
                j["counts"]["components"].get<long long>(), j["counts"]["sources"].get<long long>());
    double fit_s = 0;
    for (const auto& s : j["stages"]) {
      std::printf("  %-14s %7.3f s\n", s["stage"].get<std::string>().c_str(), s["seconds"].get<double>());
      if (s["stage"] == "fit") fit_s = s["seconds"].get<double>();
    }
    if (fit_s > 0)
      std::printf("  fit stage: %.0f components/s (incl. sky measurements)\n",
                  static_cast<double>(j["counts"]["components"].get<long long>()) / fit_s);
  }
  return 0;
}
