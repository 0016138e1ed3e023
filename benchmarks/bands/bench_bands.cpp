// Benchmark of the multi-frequency stage: three 8192 x 8192 bands with 20,000
// sources. Prints the time to make the noise maps, the forced measurement time
// and rate (20,000 components in 3 bands, given the noise maps), the
// common-resolution + spectral-index-map time, the time to form the combined
// (matched signal-to-noise) detection image from the common-resolution bands,
// and the peak RSS against 3 x the float32 size of all bands. Not a test:
// figures only.
//
// usage: bench_bands [size=8192] [sources=20000] [threads=2]
#include <sys/resource.h>
#include <tbb/global_control.h>

#include <chrono>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <vector>

#include "skerry/background.h"
#include "skerry/constants.h"
#include "skerry/forced.h"
#include "skerry/resolution.h"
#include "skerry/simulate.h"
#include "skerry/spectra.h"

using namespace skerry;

namespace {
double now() {
  return std::chrono::duration<double>(std::chrono::steady_clock::now().time_since_epoch()).count();
}
double peak_rss_mib() {
  rusage u{};
  getrusage(RUSAGE_SELF, &u);
  return static_cast<double>(u.ru_maxrss) / 1024.0;  // ru_maxrss is in KiB on Linux
}
}  // namespace

int main(int argc, char** argv) {
  const long n = argc > 1 ? std::atol(argv[1]) : 8192;
  const std::size_t nsrc = argc > 2 ? static_cast<std::size_t>(std::atol(argv[2])) : 20000;
  const int threads = argc > 3 ? std::atoi(argv[3]) : 2;
  tbb::global_control gc(tbb::global_control::max_allowed_parallelism, static_cast<std::size_t>(threads));
  const double freqs[3] = {0.9e9, 1.4e9, 3.0e9};
  const Beam beams[3] = {{12, 10, 20}, {8, 6.5, 35}, {4, 3.5, 60}};
  const double rms0[3] = {6e-5, 4e-5, 3e-5};
  const double pix = 1.0;  // arcsec; every band on its own 8192^2 grid, rotated differently
  std::vector<sim::TanGrid> grids;
  for (int b = 0; b < 3; ++b)
    grids.push_back(sim::TanGrid::square(201.25, -38.6, 0.5 * (n - 1) + 0.3 * b, 0.5 * (n - 1) - 0.2 * b, pix, 3.0 * b));

  // ---- data (not timed as part of the stage) -------------------------------------
  double t0 = now();
  sim::SkyModelOptions so;
  so.footprint = &grids[1];
  so.footprint_nx = n;
  so.footprint_ny = n;
  so.footprint_margin_pix = 50;
  so.count = nsrc;
  so.s_min_jy = 1e-4;
  so.s_max_jy = 0.05;
  so.resolved_fraction = 0.2;
  const sim::SkyModel model = sim::draw_sky_model(so, 1);
  std::vector<ImageF> img(3);
  for (int b = 0; b < 3; ++b) {
    img[b] = sim::correlated_noise(n, n, sim::beam_cov_pix(beams[b], grids[b], 0.5 * n, 0.5 * n), rms0[b], 5, b);
    sim::RenderOptions ro;
    ro.freq_hz = freqs[b];
    ro.beam = beams[b];
    sim::add_sources(img[b], grids[b], model.sources, ro);
  }
  std::printf("data: %ld x %ld x 3 bands, %zu sources, made in %.1f s\n", n, n, model.sources.size(), now() - t0);
  const double bands_mib = 3.0 * n * n * 4.0 / (1024.0 * 1024.0);

  // ---- noise maps ----------------------------------------------------------------------
  t0 = now();
  std::vector<ImageF> rms(3);
  for (int b = 0; b < 3; ++b) {
    BackgroundOptions bo;
    bo.beam_area_pix = kGaussAreaFactor * beams[b].maj_arcsec * beams[b].min_arcsec / (pix * pix);
    BackgroundResult r = estimate_background(img[b], bo);
    img[b] -= r.maps.background_image();
    rms[b] = r.maps.rms_image();
  }
  const double t_maps = now() - t0;

  // ---- forced measurement ------------------------------------------------------------------
  std::vector<ForcedSource> comps;
  for (const auto& s : model.sources) comps.push_back({s.ra_deg, s.dec_deg, s.intrinsic});
  t0 = now();
  std::vector<std::vector<ForcedMeasurement>> meas(3);
  for (int b = 0; b < 3; ++b) meas[b] = forced_measure(img[b], rms[b], 0.0, grids[b], beams[b], comps);
  const double t_forced = now() - t0;
  t0 = now();
  std::vector<std::vector<BandFlux>> per(comps.size());
  for (std::size_t i = 0; i < comps.size(); ++i)
    for (int b = 0; b < 3; ++b)
      per[i].push_back({freqs[b], meas[b][i].flux_jy, meas[b][i].flux_err_jy, meas[b][i].rms_flux_jy, 0.03});
  const auto spec = fit_spectra(per);
  const double t_spec = now() - t0;
  long fitted = 0;
  for (const auto& s : spec) fitted += s.status == SpectrumStatus::Fitted;
  rms.clear();
  rms.shrink_to_fit();

  // ---- common resolution + spectral index map (grid of band 1) --------------------------------
  t0 = now();
  const Beam common = common_beam({beams[0], beams[1], beams[2]});
  std::vector<ImageF> conv(3);
  std::vector<double> crms(3);
  for (int b = 2; b >= 0; --b) {  // band 0's grid last: it is the target grid
    ImageF on = b == 0 ? std::move(img[0]) : reproject(img[b], grids[b], grids[0], n, n);
    img[b] = ImageF();
    conv[b] = convolve_to_beam(on, grids[0], beams[b], common).image;
    crms[b] = robust_rms(conv[b]);
  }
  const SpixMapResult sm = spectral_index_map({&conv[0], &conv[1], &conv[2]}, {nullptr, nullptr, nullptr}, crms,
                                              {freqs[0], freqs[1], freqs[2]}, {0.03, 0.03, 0.03});
  const double t_common = now() - t0;
  t0 = now();
  const DetectionImageResult det = combined_detection_image({&conv[0], &conv[1], &conv[2]}, {nullptr, nullptr, nullptr},
                                                            crms, {freqs[0], freqs[1], freqs[2]});
  const double t_det = now() - t0;
  long above5 = 0;
  for (long i = 0; i < det.snr.size(); ++i) above5 += det.snr.data()[i] >= 5.0f;

  std::printf("threads: %d\n", threads);
  std::printf("noise maps (3 bands, modules/background + full-resolution rms images): %.2f s\n", t_maps);
  std::printf("forced measurement: %zu components x 3 bands in %.2f s = %.0f component-bands/s (target < 5 s)\n",
              comps.size(), t_forced, 3.0 * comps.size() / t_forced);
  std::printf("spectra: %zu fits in %.3f s (%ld with alpha)\n", spec.size(), t_spec, fitted);
  std::printf("common resolution (reproject 2 bands, convolve 3, rms) + alpha map: %.2f s (%ld map pixels; common beam %.2f x %.2f arcsec PA %.1f)\n",
              t_common, sm.n_pixels, common.maj_arcsec, common.min_arcsec, common.pa_deg);
  std::printf("combined detection image (3 bands at the common resolution -> D): %.2f s (%ld pixels, %ld with D >= 5)\n",
              t_det, det.n_pixels, above5);
  std::printf("peak RSS: %.0f MiB = %.2f x the float32 size of all bands (%.0f MiB; target <= 3)\n", peak_rss_mib(),
              peak_rss_mib() / bands_mib, bands_mib);
  return 0;
}
