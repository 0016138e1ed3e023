// Benchmark: isolated components fitted per second (decomposition, bounded
// Levenberg-Marquardt, sandwich covariance) on 1 and 2 threads, plus the sky
// measurement rate. Prints figures; it asserts nothing (tests do that).
//
// Usage: bench_fitting [n_sources=20000] [stamp_pixels=32]
// Scene: point sources with true SNR log-uniform in [5, 100] at the centres of a
// grid of stamps, in beam-correlated noise (modules/simulate), beam 10" x 8" PA 30
// on 2" pixels (5 x 4 pixels FWHM); islands = pixels >= 3 sigma connected to the
// brightest central pixel. Only fit_islands() and measure_on_sky() are timed.
#include <sys/resource.h>
#include <tbb/global_control.h>
#include <tbb/parallel_for.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <random>
#include <vector>

#include "skerry/fitting.h"
#include "skerry/simulate.h"

namespace {

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

skerry::IslandCutout cutout(const skerry::ImageF& img, double rms, int x0, int y0, int w,
                            const Eigen::Matrix2d& bp, std::int64_t id) {
  skerry::IslandCutout c;
  c.island_id = id;
  c.x_origin = x0;
  c.y_origin = y0;
  c.data = img.block(y0, x0, w, w);
  c.rms.setConstant(w, w, static_cast<float>(rms));
  c.mask.setConstant(w, w, skerry::kCutoutFree);
  c.beam_cov_pix = bp;
  int sx = w / 2, sy = w / 2;
  for (int y = w / 2 - 2; y <= w / 2 + 2; ++y)
    for (int x = w / 2 - 2; x <= w / 2 + 2; ++x)
      if (c.data(y, x) > c.data(sy, sx)) sx = x, sy = y;
  std::vector<int> st{sy * w + sx};
  while (!st.empty()) {
    const int p = st.back();
    st.pop_back();
    const int px = p % w, py = p / w;
    if (c.mask(py, px) == skerry::kCutoutIsland) continue;
    c.mask(py, px) = skerry::kCutoutIsland;
    for (int dy = -1; dy <= 1; ++dy)
      for (int dx = -1; dx <= 1; ++dx) {
        const int qx = px + dx, qy = py + dy;
        if (qx >= 0 && qy >= 0 && qx < w && qy < w && c.mask(qy, qx) != skerry::kCutoutIsland &&
            c.data(qy, qx) >= 3.0 * rms)
          st.push_back(qy * w + qx);
      }
  }
  return c;
}

double cpu_s() {
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  return ru.ru_utime.tv_sec + ru.ru_stime.tv_sec + 1e-6 * (ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
}

}  // namespace

int main(int argc, char** argv) {
  const int n_src = argc > 1 ? std::atoi(argv[1]) : 20000;
  const int w = argc > 2 ? std::atoi(argv[2]) : 32;
  const int side = static_cast<int>(std::ceil(std::sqrt(static_cast<double>(n_src))));
  const int n = side * w;
  const double rms = 1e-4;
  const skerry::Beam beam{10.0, 8.0, 30.0};
  const auto sky = skerry::sim::TanGrid::square(201.25, -38.6, n / 2.0, n / 2.0, 2.0);
  const Eigen::Matrix2d bp = skerry::sim::beam_cov_pix(beam, sky, n / 2.0, n / 2.0);
  double t0 = now_s();
  skerry::ImageF img = skerry::sim::correlated_noise(n, n, bp, rms, 1);
  std::mt19937_64 rng(2);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  std::vector<skerry::sim::SkySource> src;
  for (int k = 0; k < n_src; ++k) {
    double ra, dec;
    sky.pix_to_sky(w * (k % side) + w / 2 + u(rng) - 0.5, w * (k / side) + w / 2 + u(rng) - 0.5, ra, dec);
    src.push_back(skerry::sim::make_source(ra, dec, rms * 5.0 * std::pow(20.0, u(rng))));
  }
  skerry::sim::RenderOptions ro;
  ro.beam = beam;
  skerry::sim::add_sources(img, sky, src, ro);
  std::vector<skerry::IslandCutout> isl;
  isl.reserve(n_src);
  long npix = 0;
  for (int k = 0; k < n_src; ++k) {
    isl.push_back(cutout(img, rms, w * (k % side), w * (k / side), w, bp, k));
    npix += (isl.back().mask == skerry::kCutoutIsland).count();
  }
  std::printf("scene: %d isolated point sources, SNR 5-100, %dx%d image, beam 5x4 pix FWHM, "
              "%.1f island pixels per source (setup %.2f s)\n",
              n_src, n, n, static_cast<double>(npix) / n_src, now_s() - t0);

  std::vector<skerry::IslandFit> ref;
  for (int threads : {1, 2}) {
    tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
    const double a = now_s(), ca = cpu_s();
    auto fits = skerry::fit_islands(isl, {});
    const double fit_s = now_s() - a, fit_cpu = cpu_s() - ca;
    long comps = 0, multi = 0, iters = 0;
    for (const auto& f : fits) {
      comps += static_cast<long>(f.components.size());
      multi += f.components.size() > 1;
      iters += f.lm_iterations;
    }
    const double b = now_s();
    std::vector<double> sint(fits.size());
    tbb::parallel_for(std::size_t(0), fits.size(), [&](std::size_t i) {
      sint[i] = skerry::measure_on_sky(fits[i].components[0], sky, beam, {}).s_int_jy;
    });
    const double sky_s = now_s() - b;
    bool same = true;
    if (ref.empty()) {
      ref = fits;
    } else {
      for (std::size_t i = 0; i < fits.size(); ++i)
        same = same && fits[i].components[0].amplitude == ref[i].components[0].amplitude &&
               fits[i].components[0].x == ref[i].components[0].x;
    }
    std::printf("threads %d: fit %.3f s wall = %.0f components/s (CPU %.3f s = %.0f components per "
                "CPU-second; %.1f LM steps/island, %ld multi-component islands); sky measurement "
                "%.3f s = %.0f components/s%s\n",
                threads, fit_s, comps / fit_s, fit_cpu, comps / fit_cpu,
                static_cast<double>(iters) / fits.size(), multi, sky_s,
                comps / sky_s, ref.empty() || same ? "" : "  RESULTS DIFFER FROM 1 THREAD");
  }
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  std::printf("peak RSS %.1f MiB (image %.1f MiB as float32)\n", ru.ru_maxrss / 1024.0,
              4.0 * n * n / (1024.0 * 1024.0));
  return 0;
}
