// Figures for the FITS/WCS adapter (never a test): write and read time of a
// float32 image (plain and gzip), the peak RSS of the read
// compared with the image bytes, and pixel <-> sky throughput of the bulk and the
// one-point conversions on 1 and 2 threads.
//
//   bench_io [SIDE]   (default 8192: an 8192 x 8192 image, 256 MiB of float32)
#include <sys/resource.h>
#include <unistd.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <filesystem>
#include <string>
#include <thread>
#include <vector>

#include "io/fits_image.h"
#include "io/wcs.h"

namespace {

double now_s() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}

double peak_rss_mib() {
  struct rusage ru;
  getrusage(RUSAGE_SELF, &ru);
  return static_cast<double>(ru.ru_maxrss) / 1024.0;  // ru_maxrss is in KiB on Linux
}

}  // namespace

int main(int argc, char** argv) {
  using namespace skerry;
  const long side = argc > 1 ? std::atol(argv[1]) : 8192;
  namespace fs = std::filesystem;
  const fs::path dir = fs::temp_directory_path() / ("skerry-bench-io-" + std::to_string(::getpid()));
  fs::create_directories(dir);

  GridSpec g;
  g.nx = g.ny = side;
  g.projection = "SIN";
  g.crval1_deg = 201.25;  // the invented Lanternfish Field
  g.crval2_deg = -38.6;
  g.crpix1 = g.crpix2 = 0.5 * static_cast<double>(side) + 0.5;
  g.cdelt1_deg = -1.5 / 3600;
  g.cdelt2_deg = 1.5 / 3600;
  g.beam = Beam{8.0, 6.0, 20.0};
  g.freq_hz = 1.4e9;
  ImageF px(side, side);
  for (long y = 0; y < side; ++y)
    for (long x = 0; x < side; ++x) px(y, x) = static_cast<float>(std::sin(0.001 * static_cast<double>(x * 7 + y * 3)));
  const double image_mib = static_cast<double>(side) * static_cast<double>(side) * 4.0 / (1024.0 * 1024.0);
  SkyImage like = make_sky_image(g, std::move(px), "bench");  // holds the only copy
  std::printf("image %ld x %ld float32 = %.1f MiB; peak RSS after building it %.1f MiB\n", side, side,
              image_mib, peak_rss_mib());

  const std::string plain = (dir / "plain.fits").string();
  double t0 = now_s();
  write_fits_image(plain, like.pixels, like);
  double t1 = now_s();
  std::printf("write plain (atomic, fsync): %.3f s  %.1f MiB/s\n", t1 - t0, image_mib / (t1 - t0));
  like.pixels.resize(0, 0);  // so that the read's RSS can be seen on its own

  t0 = now_s();
  SkyImage im = read_sky_image(plain);
  t1 = now_s();
  std::printf("read plain: %.3f s  %.1f MiB/s; peak RSS so far %.1f MiB = %.2f x image bytes\n",
              t1 - t0, image_mib / (t1 - t0), peak_rss_mib(), peak_rss_mib() / image_mib);

  // A gzip copy of the plain file (gzip -1; CFITSIO decompresses it on reading).
  const std::string gz = (dir / "image.fits.gz").string();
  const std::string cmd1 = "gzip -1 -c " + plain + " > " + gz;
  if (std::system(cmd1.c_str()) != 0) std::printf("gzip failed\n");
  t0 = now_s();
  SkyImage imgz = read_sky_image(gz);
  t1 = now_s();
  std::printf("read gzip (%.1f MiB on disk): %.3f s  %.1f MiB/s of pixels\n",
              static_cast<double>(fs::file_size(gz)) / (1024.0 * 1024.0), t1 - t0, image_mib / (t1 - t0));
  imgz.pixels.resize(0, 0);

  // Pixel -> sky -> pixel throughput.
  const std::size_t n = 4'000'000;
  std::vector<double> x(n), y(n), ra(n), dec(n), x2(n), y2(n);
  for (std::size_t i = 0; i < n; ++i) {
    x[i] = static_cast<double>(i % static_cast<std::size_t>(side));
    y[i] = static_cast<double>((i * 7919) % static_cast<std::size_t>(side));
  }
  t0 = now_s();
  pix_to_sky_many(*im.wcs, n, x.data(), y.data(), ra.data(), dec.data());
  t1 = now_s();
  sky_to_pix_many(*im.wcs, n, ra.data(), dec.data(), x2.data(), y2.data());
  double t2 = now_s();
  double worst = 0;
  for (std::size_t i = 0; i < n; ++i) worst = std::max(worst, std::abs(x2[i] - x[i]) + std::abs(y2[i] - y[i]));
  std::printf("bulk pix->sky 1 thread: %.2f Mpoint/s; sky->pix %.2f Mpoint/s (round trip worst %.2e pix)\n",
              n / (t1 - t0) / 1e6, n / (t2 - t1) / 1e6, worst);
  for (int threads : {1, 2}) {
    t0 = now_s();
    std::vector<std::thread> ts;
    const std::size_t per = n / static_cast<std::size_t>(threads);
    for (int t = 0; t < threads; ++t)
      ts.emplace_back([&, t] {
        const std::size_t b = per * static_cast<std::size_t>(t);
        for (std::size_t i = b; i < b + per; ++i) im.wcs->pix_to_sky(x[i], y[i], ra[i], dec[i]);
      });
    for (auto& th : ts) th.join();
    t1 = now_s();
    std::printf("one-point pix->sky on %d thread(s): %.2f Mpoint/s\n", threads, n / (t1 - t0) / 1e6);
  }
  for (int threads : {2}) {
    t0 = now_s();
    std::vector<std::thread> ts;
    const std::size_t per = n / static_cast<std::size_t>(threads);
    for (int t = 0; t < threads; ++t)
      ts.emplace_back([&, t] {
        const std::size_t b = per * static_cast<std::size_t>(t);
        pix_to_sky_many(*im.wcs, per, x.data() + b, y.data() + b, ra.data() + b, dec.data() + b);
      });
    for (auto& th : ts) th.join();
    t1 = now_s();
    std::printf("bulk pix->sky on %d threads: %.2f Mpoint/s\n", threads, n / (t1 - t0) / 1e6);
  }
  std::printf("peak RSS at the end %.1f MiB\n", peak_rss_mib());
  fs::remove_all(dir);
  return 0;
}
