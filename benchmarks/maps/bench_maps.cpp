// Benchmark: noise maps and islands on an 8192 x 8192 image.
//
// Builds an image of beam-correlated noise (white noise smoothed by a
// separable Gaussian of FWHM beam / sqrt 2) plus point sources, writes it once
// as FITS, then, for 1 and 2 threads, runs in a fresh child process (so that
// its peak RSS covers only what the pipeline holds):
//   read (read_sky_image) -> noise maps pass 1 -> islands -> grow mask ->
//   noise maps pass 2 (mask) -> thresholding + labelling
// and prints times, throughputs (Mpixel/s) and peak RSS (getrusage
// ru_maxrss) beside the float32 image size. Prints figures only; asserts nothing.
//
//   bench_maps [size=8192]
#include <sys/resource.h>
#include <sys/wait.h>
#include <tbb/blocked_range.h>
#include <tbb/global_control.h>
#include <tbb/parallel_for.h>
#include <unistd.h>

#include <chrono>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <string>
#include <vector>

#include "app/errors.h"
#include "io/fits_image.h"
#include "io/wcs.h"
#include "skerry/background.h"
#include "skerry/constants.h"
#include "skerry/islands.h"

using namespace skerry;

namespace {

constexpr double kBeamPix = 4.0;         // beam FWHM [pixels]
constexpr double kPixelArcsec = 1.5;     // pixel size [arcsec]
constexpr double kRmsJy = 25e-6;         // noise [Jy/beam]

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}
// Process CPU time (user + system) [s]: with other jobs on the machine, wall
// times include waiting; CPU time per pixel does not.
double cpu_s() {
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  return ru.ru_utime.tv_sec + ru.ru_stime.tv_sec + 1e-6 * (ru.ru_utime.tv_usec + ru.ru_stime.tv_usec);
}
double peak_rss_bytes() {
  rusage ru{};
  getrusage(RUSAGE_SELF, &ru);
  return static_cast<double>(ru.ru_maxrss) * 1024.0;  // Linux: kilobytes
}

std::uint64_t splitmix(std::uint64_t& s) {
  std::uint64_t z = (s += 0x9e3779b97f4a7c15ull);
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ull;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebull;
  return z ^ (z >> 31);
}
double uniform01(std::uint64_t& s) { return (static_cast<double>(splitmix(s) >> 11) + 0.5) * 0x1.0p-53; }

// Beam-correlated noise of rms kRmsJy plus point sources; deterministic.
ImageF make_image(int n) {
  ImageF img(n, n);
  // White noise, Box-Muller on a per-row counter-based stream.
  tbb::parallel_for(tbb::blocked_range<int>(0, n, 16), [&](const tbb::blocked_range<int>& r) {
    for (int y = r.begin(); y < r.end(); ++y) {
      std::uint64_t s = 0x5eed0000ull + static_cast<std::uint64_t>(y) * 0x10001ull;
      float* p = &img(y, 0);
      for (int x = 0; x + 1 < n; x += 2) {
        const double u1 = uniform01(s), u2 = uniform01(s);
        const double rad = std::sqrt(-2.0 * std::log(u1));
        p[x] = static_cast<float>(rad * std::cos(2.0 * kPi * u2));
        p[x + 1] = static_cast<float>(rad * std::sin(2.0 * kPi * u2));
      }
      if (n % 2) p[n - 1] = 0.0f;
    }
  });
  // Separable Gaussian kernel, FWHM beam / sqrt 2, normalised to sum k^2 = 1
  // (2-D sum of squares 1: unit variance kept), then scaled to the rms.
  const double sk = kBeamPix / std::sqrt(2.0) * kFwhmToSigma;
  const int half = static_cast<int>(std::ceil(4.0 * sk));
  std::vector<float> k(2 * half + 1);
  double ss = 0.0;
  for (int i = -half; i <= half; ++i) ss += std::exp(-i * i / (sk * sk));
  for (int i = -half; i <= half; ++i) k[i + half] = static_cast<float>(std::exp(-0.5 * i * i / (sk * sk)) / std::sqrt(ss));
  ImageF tmp(n, n);
  tbb::parallel_for(tbb::blocked_range<int>(0, n, 16), [&](const tbb::blocked_range<int>& r) {
    for (int y = r.begin(); y < r.end(); ++y) {
      const float* p = &img(y, 0);
      float* o = &tmp(y, 0);
      for (int x = 0; x < n; ++x) {
        float s = 0.0f;
        for (int i = -half; i <= half; ++i) {
          const int xx = std::clamp(x + i, 0, n - 1);
          s += k[i + half] * p[xx];
        }
        o[x] = s;
      }
    }
  });
  tbb::parallel_for(tbb::blocked_range<int>(0, n, 16), [&](const tbb::blocked_range<int>& r) {
    std::vector<float> acc(n);
    for (int y = r.begin(); y < r.end(); ++y) {
      std::fill(acc.begin(), acc.end(), 0.0f);
      for (int i = -half; i <= half; ++i) {
        const float* p = &tmp(std::clamp(y + i, 0, n - 1), 0);
        const float w = k[i + half];
        for (int x = 0; x < n; ++x) acc[x] += w * p[x];
      }
      float* o = &img(y, 0);
      for (int x = 0; x < n; ++x) o[x] = static_cast<float>(kRmsJy) * acc[x];
    }
  });
  tmp.resize(0, 0);
  // Point sources: one per ~ 100 x 100 pixels, peaks 3 .. 3000 sigma with a
  // Euclidean-like count N(>S) ~ S^-1.5.
  const int nsrc = n / 100 * (n / 100);
  std::uint64_t s = 0xabcdefull;
  const double s2 = std::pow(kBeamPix * kFwhmToSigma, 2);
  for (int i = 0; i < nsrc; ++i) {
    const double x0 = uniform01(s) * (n - 1), y0 = uniform01(s) * (n - 1);
    const double peak = 3.0 * kRmsJy * std::pow(uniform01(s), -1.0 / 1.5);
    const double pk = std::min(peak, 3000.0 * kRmsJy);
    const int r = 3 * static_cast<int>(kBeamPix);
    for (int y = std::max(0, static_cast<int>(y0) - r); y <= std::min(n - 1, static_cast<int>(y0) + r); ++y)
      for (int x = std::max(0, static_cast<int>(x0) - r); x <= std::min(n - 1, static_cast<int>(x0) + r); ++x)
        img(y, x) += static_cast<float>(pk * std::exp(-0.5 * ((x - x0) * (x - x0) + (y - y0) * (y - y0)) / s2));
  }
  return img;
}

int measure(const std::string& path, int threads) {
  tbb::global_control gc(tbb::global_control::max_allowed_parallelism, threads);
  const double t0 = now_s();
  SkyImage im = read_sky_image(path);
  const double t_read = now_s() - t0;
  const ImageF& img = im.pixels;
  const double npix = static_cast<double>(img.size());
  BackgroundOptions bo;  // defaults: box 30 beams, step = box, 3-sigma clipping
  bo.beam_fwhm_pix = std::sqrt(im.beam.maj_arcsec * im.beam.min_arcsec) / kPixelArcsec;

  const double t1 = now_s(), c1 = cpu_s();
  BackgroundResult pass1 = estimate_background(img, bo);
  const double t2 = now_s();
  MaskU8 mask;
  {
    const IslandResult first = find_islands(img, pass1.maps, IslandOptions{});
    mask = grow_mask(first.labels, static_cast<int>(std::lround(bo.beam_fwhm_pix)));  // 1 beam margin
  }
  const double t3 = now_s();
  BackgroundResult pass2 = estimate_background(img, bo, &mask);
  mask.resize(0, 0);
  const double t4 = now_s(), c4 = cpu_s();
  const IslandResult isl = find_islands(img, pass2.maps, IslandOptions{});
  const double t5 = now_s(), c5 = cpu_s();

  const double mp = npix / 1e6;
  const double stage = (t2 - t1) + (t3 - t2) + (t4 - t3);
  std::printf("threads %d: read %.3f s (%.0f Mpixel/s)\n", threads, t_read, mp / t_read);
  std::printf("threads %d: noise maps pass 1 %.3f s, islands + mask %.3f s, pass 2 %.3f s\n", threads, t2 - t1,
              t3 - t2, t4 - t3);
  std::printf("threads %d: noise-map stage (both passes incl. the mask between them) %.3f s = %.1f Mpixel/s"
              " (the two passes alone: %.1f Mpixel/s)\n",
              threads, stage, mp / stage, mp / ((t2 - t1) + (t4 - t3)));
  std::printf("threads %d: CPU time: noise-map stage %.3f s (%.1f ns/pixel), thresholding + labelling %.3f s"
              " (%.2f ns/pixel); wall/CPU shows how much the machine was shared\n",
              threads, c4 - c1, (c4 - c1) / npix * 1e9, c5 - c4, (c5 - c4) / npix * 1e9);
  std::printf("threads %d: thresholding + labelling %.3f s = %.1f Mpixel/s (%zu islands)\n", threads, t5 - t4,
              mp / (t5 - t4), isl.islands.size());
  const BackgroundGrid& g = *pass2.maps.grid();
  double mean_rms = 0.0;
  for (int j = 0; j < g.ny(); ++j)
    for (int i = 0; i < g.nx(); ++i) mean_rms += g.rms(j, i);
  mean_rms /= g.nx() * g.ny();
  const double rss = peak_rss_bytes(), img_bytes = 4.0 * npix;
  std::printf("threads %d: grid %d x %d boxes of %d pixels; mean rms %.4g Jy/beam (truth %.4g)\n", threads, g.nx(),
              g.ny(), g.box_pixels, mean_rms, kRmsJy);
  std::printf("threads %d: peak RSS %.1f MiB = %.2f x the float32 image (%.1f MiB)\n", threads, rss / 1048576.0,
              rss / img_bytes, img_bytes / 1048576.0);
  std::fflush(stdout);
  return 0;
}

}  // namespace

int main(int argc, char** argv) {
  try {
    if (argc >= 4 && std::string(argv[1]) == "--measure") return measure(argv[2], std::atoi(argv[3]));
    const int n = argc >= 2 ? std::atoi(argv[1]) : 8192;
    if (n < 64) {
      std::fprintf(stderr, "bench_maps: size must be >= 64\n");
      return 2;
    }
    const auto path = std::filesystem::temp_directory_path() /
                      ("skerry_bench_maps_" + std::to_string(::getpid()) + ".fits");
    std::printf("image %d x %d = %.1f Mpixel, float32 %.1f MiB; beam %.1f pixels, rms %.3g Jy/beam\n", n, n,
                n * double(n) / 1e6, 4.0 * n * double(n) / 1048576.0, kBeamPix, kRmsJy);
    {
      const double t0 = now_s();
      ImageF img = make_image(n);
      const double t1 = now_s();
      GridSpec grid;
      grid.nx = grid.ny = n;
      grid.projection = "SIN";
      grid.crval1_deg = 201.25;  // Lanternfish Field (invented)
      grid.crval2_deg = -38.6;
      grid.crpix1 = grid.crpix2 = n / 2.0 + 1.0;
      grid.cdelt1_deg = -kPixelArcsec / 3600.0;
      grid.cdelt2_deg = kPixelArcsec / 3600.0;
      grid.beam = Beam{kBeamPix * kPixelArcsec, kBeamPix * kPixelArcsec, 0.0};
      const SkyImage like = make_sky_image(grid, std::move(img), "SKDC benchmark");
      write_fits_image(path.string(), like.pixels, like);
      std::printf("built in %.2f s, written in %.2f s (%s)\n", t1 - t0, now_s() - t1, path.c_str());
    }
    std::fflush(stdout);
    for (int threads : {1, 2}) {
      const pid_t pid = fork();
      if (pid == 0) {
        const std::string t = std::to_string(threads);
        execl("/proc/self/exe", argv[0], "--measure", path.c_str(), t.c_str(), static_cast<char*>(nullptr));
        _exit(127);
      }
      int status = 0;
      waitpid(pid, &status, 0);
      if (!WIFEXITED(status) || WEXITSTATUS(status) != 0) std::fprintf(stderr, "bench_maps: child failed\n");
    }
    std::filesystem::remove(path);
    return 0;
  } catch (const std::exception& e) {
    std::fprintf(stderr, "bench_maps: error: %s\n", e.what());
    return 1;
  }
}
