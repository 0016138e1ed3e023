// Prints figures for the simulator on an 8192 x 8192 grid: beam-correlated noise,
// a 20,000-source sky model and its rendering, for 1 and 2 threads; peak RSS from
// getrusage. Not a test.
//   bench_simulate [size_pix] [count]
#include <sys/resource.h>
#include <tbb/global_control.h>

#include <chrono>
#include <cstdio>
#include <cstdlib>
#include <cstring>

#include "skerry/simulate.h"

using namespace skerry;
using namespace skerry::sim;

namespace {

double seconds_since(std::chrono::steady_clock::time_point t0) {
  return std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
}

double peak_rss_mb() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return static_cast<double>(u.ru_maxrss) / 1024.0;  // ru_maxrss is in kB on Linux
}

}  // namespace

int main(int argc, char** argv) {
  const long n = argc > 1 ? std::atol(argv[1]) : 8192;
  const std::size_t count = argc > 2 ? static_cast<std::size_t>(std::atol(argv[2])) : 20000;
  const double pix = 1.5;
  const TanGrid grid = TanGrid::square(201.25, -38.6, 0.5 * (n - 1), 0.5 * (n - 1), pix);
  const double mpix = static_cast<double>(n) * n / 1e6;
  std::printf("grid %ld x %ld (%.1f Mpixel, float32 image %.0f MB), %zu sources\n", n, n, mpix,
              mpix * 4.0, count);
  ImageF first;
  for (int threads : {1, 2}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    auto t0 = std::chrono::steady_clock::now();
    const ImageF noise = correlated_noise(n, n, beam_cov_pix_flat(Beam{6.0, 5.0, 20.0}, pix), 2e-5, 1);
    const double t_noise = seconds_since(t0);

    SkyModelOptions so;
    so.count = count;
    so.footprint = &grid;
    so.footprint_nx = so.footprint_ny = n;
    so.radius_deg = 0.8 * n * pix / 3600.0;
    so.resolved_fraction = 0.2;
    t0 = std::chrono::steady_clock::now();
    const SkyModel m = draw_sky_model(so, 1);
    const double t_draw = seconds_since(t0);

    BandOptions bo;
    bo.nx = bo.ny = n;
    bo.beam = Beam{6.0, 5.0, 20.0};
    bo.pb_fwhm_deg = 4.0;
    bo.background_amplitude_jy_per_beam = 5e-6;
    t0 = std::chrono::steady_clock::now();
    const BandImage b = simulate_band(m, grid, bo, 1);
    const double t_band = seconds_since(t0);
    const bool same = first.size() == 0 ||
                      std::memcmp(first.data(), b.image.data(), sizeof(float) * b.image.size()) == 0;
    if (first.size() == 0) first = b.image;
    std::printf(
        "threads %d: noise %.2f s (%.1f Mpixel/s); sky model %.3f s; full band image (noise, pb, "
        "background, sources) %.2f s (%.1f Mpixel/s); same bytes as 1 thread: %s; peak RSS %.0f MB "
        "(%.2f x image)\n",
        threads, t_noise, mpix / t_noise, t_draw, t_band, mpix / t_band, same ? "yes" : "NO",
        peak_rss_mb(), peak_rss_mb() / (mpix * 4.0));
  }
  return 0;
}
