#pragma once
// Helpers shared by the extract tests: simulated images of point sources. Running
// the `skerry` binary, temporary folders and reading files come from the shared
// test support library (skerry_test_support.h).
#include <gtest/gtest.h>

#include <cmath>
#include <cstdio>
#include <filesystem>
#include <fstream>
#include <random>
#include <sstream>
#include <string>
#include <vector>

#include "io/fits_image.h"
#include "io/table_io.h"
#include "io/wcs.h"
#include "skerry/simulate.h"
#include "skerry/table.h"
#include "skerry_test_support.h"

namespace skerry::test {

namespace fs = std::filesystem;

/// Runs a program without a shell, output captured in `tmp_dir` (support library).
inline RunResult run_args(const std::vector<std::string>& args, const std::string& tmp_dir) {
  return run(args, tmp_dir);
}

/// The Lanternfish Field grid of the injection tests: SIN about RA 201.25,
/// Dec -38.6, square pixels of `pix_arcsec`, east to the left.
inline GridSpec lanternfish_grid(long n, double pix_arcsec, const Beam& beam) {
  GridSpec g;
  g.nx = g.ny = n;
  g.projection = "SIN";
  g.frame = "ICRS";
  g.crval1_deg = 201.25;
  g.crval2_deg = -38.6;
  g.crpix1 = 0.5 * (n + 1);
  g.crpix2 = 0.5 * (n + 1);
  g.cdelt1_deg = -pix_arcsec / 3600.0;
  g.cdelt2_deg = pix_arcsec / 3600.0;
  g.beam = beam;
  g.freq_hz = 1.4e9;
  return g;
}

struct Injected {
  double x = 0, y = 0;          ///< 0-based pixel of the centre
  double ra = 0, dec = 0;       ///< ICRS [deg]
  double s_int_jy = 0;          ///< = peak for a point source
  double snr_true = 0;          ///< true peak / rms
};

/// Point sources on a jittered lattice (cells of `cell` pixels, centres moved
/// by up to +-jitter pixels; cells within `margin` pixels of the edge left
/// empty), true SNR drawn by `snr_of(i, rng)`, on beam-correlated noise of rms
/// `rms`; sign = -1 gives the negated image. Writes `path`; returns the truth.
template <class SnrFn>
std::vector<Injected> write_point_field(const std::string& path, long n, double pix_arcsec,
                                        const Beam& beam, double rms, long cell, double jitter,
                                        long margin, std::uint64_t seed, SnrFn snr_of,
                                        double sign = 1.0, bool with_sources = true) {
  const GridSpec g = lanternfish_grid(n, pix_arcsec, beam);
  SkyImage im = make_sky_image(g, ImageF::Zero(n, n), "Lanternfish Field (simulated)");
  const Eigen::Matrix2d cov = sim::beam_cov_pix(beam, *im.wcs, 0.5 * (n - 1), 0.5 * (n - 1));
  im.pixels = sim::correlated_noise(n, n, cov, rms, seed, 7);
  std::mt19937_64 rng(seed * 7919 + 13);
  std::uniform_real_distribution<double> u(-jitter, jitter);
  std::vector<Injected> truth;
  std::vector<sim::SkySource> srcs;
  if (with_sources) {
    for (long cy = margin; cy + cell <= n - margin; cy += cell) {
      for (long cx = margin; cx + cell <= n - margin; cx += cell) {
        Injected t;
        t.x = cx + 0.5 * cell + u(rng);
        t.y = cy + 0.5 * cell + u(rng);
        t.snr_true = snr_of(truth.size(), rng);
        t.s_int_jy = t.snr_true * rms;
        if (!im.wcs->pix_to_sky(t.x, t.y, t.ra, t.dec)) continue;
        truth.push_back(t);
        srcs.push_back(sim::make_source(t.ra, t.dec, t.s_int_jy));
      }
    }
    sim::RenderOptions ro;
    ro.beam = beam;
    ro.freq_hz = g.freq_hz;
    sim::add_sources(im.pixels, *im.wcs, srcs, ro);
  }
  if (sign < 0) im.pixels = -im.pixels;
  write_fits_image(path, im.pixels, im);
  return truth;
}

}  // namespace skerry::test
