// FITS image reading and writing (pipeline/io/fits_image.cpp). Test files are made
// here with CFITSIO directly (io_test_util.h), or byte by byte for headers CFITSIO
// would not write. Expected pixel values follow the FITS Standard 4.0 rules
// (REF-FITS-02: physical = BZERO + BSCALE x stored; BLANK for integer data, NaN
// for floating data; unsigned 16-bit as BZERO = 32768).
#include <fitsio.h>
#include <gtest/gtest.h>
#include <signal.h>
#include <sys/resource.h>
#include <sys/wait.h>
#include <unistd.h>

#include <array>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <fstream>
#include <limits>
#include <string>
#include <thread>
#include <vector>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "io/wcs.h"
#include "io_test_util.h"

namespace skerry {
namespace {

using namespace iotest;

const double kNaN = std::numeric_limits<double>::quiet_NaN();

/// The message of the exception E that reading `path` throws ("" and a failure otherwise).
template <typename E = InputError>
std::string read_error(const std::string& path, const ImageReadOptions& o = {}) {
  try {
    read_sky_image(path, o);
  } catch (const E& e) {
    return e.what();
  } catch (const std::exception& e) {
    ADD_FAILURE() << "unexpected exception type: " << e.what();
    return "";
  }
  ADD_FAILURE() << "no error reading " << path;
  return "";
}

/// One line, starting with the file name, saying `phrase`.
void expect_message(const std::string& m, const std::string& path, const std::string& phrase) {
  EXPECT_EQ(m.rfind(path + ": ", 0), 0u) << m;
  EXPECT_NE(m.find(phrase), std::string::npos) << "'" << m << "' lacks '" << phrase << "'";
  EXPECT_EQ(m.find('\n'), std::string::npos) << m;
}

std::vector<std::string> with(std::vector<std::string> cards, const std::vector<std::string>& more) {
  cards.insert(cards.end(), more.begin(), more.end());
  return cards;
}

std::vector<std::string> without(const std::vector<std::string>& cards, const std::string& key) {
  std::vector<std::string> out;
  for (const auto& c : cards)
    if (c.rfind(key + " ", 0) != 0) out.push_back(c);
  return out;
}

// ---- Data types ----------------------------------------------------------------------

struct BitpixCase {
  int bitpix;
  double bscale, bzero;
  bool has_blank;
  double blank;
  std::vector<double> stored;  // 6 x 4 values
};

TEST(FitsRead, EveryBitpixWithScalingAndBlank) {
  std::vector<BitpixCase> cases;
  auto ramp = [](double start, double step) {
    std::vector<double> v;
    for (int i = 0; i < 24; ++i) v.push_back(start + step * i);
    return v;
  };
  // BITPIX 8 (unsigned bytes), BLANK 255.
  cases.push_back({8, 0.5, -3.0, true, 255, ramp(0, 10)});
  cases.back().stored[5] = 255;
  // BITPIX 16: REF-FITS-02 check value stored 1000 with BSCALE 0.001 -> 1.0.
  cases.push_back({16, 0.001, 0.0, true, -1, ramp(1000, -97)});
  cases.back().stored[7] = -1;
  // Unsigned 16-bit: BZERO 32768; stored -32768 -> 0, 32767 -> 65535 (REF-FITS-02).
  cases.push_back({16, 1.0, 32768.0, false, 0, ramp(-32768, 2000)});
  cases.back().stored[23] = 32767;
  cases.push_back({32, 1e-6, 5.0, true, -2147483648.0, ramp(-1000000, 123457)});
  cases.back().stored[0] = -2147483648.0;
  cases.push_back({64, 1e-9, 0.0, true, -9223372036854775808.0, ramp(5e9, -7e8)});
  cases.back().stored[11] = -9223372036854775808.0;
  cases.push_back({-32, 1.0, 0.0, false, 0, ramp(-1.25, 0.125)});
  cases.back().stored[3] = kNaN;
  cases.push_back({-64, 2.0, 1.0, false, 0, ramp(1e-3, 2.5e-4)});  // BSCALE on floats applies too
  cases.back().stored[9] = kNaN;
  ScratchDir dir;
  for (const auto& c : cases) {
    const std::string path = dir.file("bitpix" + std::to_string(c.bitpix) + "_" +
                                      std::to_string(static_cast<long>(c.bzero)) + ".fits");
    FitsSpec s;
    s.bitpix = c.bitpix;
    s.naxes = {6, 4};
    s.stored = c.stored;
    s.cards = sky_cards();
    s.cards.push_back("BSCALE  = " + fits_real(c.bscale));
    s.cards.push_back("BZERO   = " + fits_real(c.bzero));
    if (c.has_blank) {
      char b[40];
      std::snprintf(b, sizeof b, "BLANK   = %lld", static_cast<long long>(c.blank));
      s.cards.push_back(b);
    }
    write_fits(path, s);
    const SkyImage im = read_sky_image(path);
    ASSERT_EQ(im.pixels.rows(), 4);
    ASSERT_EQ(im.pixels.cols(), 6);
    int blanks = 0;
    for (int i = 0; i < 24; ++i) {
      const float got = im.pixels(i / 6, i % 6);
      const bool blank = std::isnan(c.stored[i]) || (c.has_blank && c.stored[i] == c.blank);
      if (blank) {
        EXPECT_TRUE(std::isnan(got)) << "BITPIX " << c.bitpix << " pixel " << i;
        ++blanks;
        continue;
      }
      const double expect = c.bzero + c.bscale * c.stored[i];
      EXPECT_FLOAT_EQ(got, static_cast<float>(expect)) << "BITPIX " << c.bitpix << " pixel " << i;
    }
    EXPECT_EQ(blanks, (c.has_blank || c.bitpix < 0) ? 1 : 0);
  }
}

TEST(FitsRead, RefFits02CheckValues) {
  // REF-FITS-02: int16 1000 with BSCALE 0.001 -> 1.0; int16 -32768 with BZERO 32768 -> 0;
  // 32767 -> 65535 (exact).
  ScratchDir dir;
  FitsSpec s;
  s.bitpix = 16;
  s.naxes = {3, 1};
  s.stored = {1000, -32768, 32767};
  s.cards = with(sky_cards(), {"BSCALE  = 0.001"});
  write_fits(dir.file("a.fits"), s);
  EXPECT_FLOAT_EQ(read_sky_image(dir.file("a.fits")).pixels(0, 0), 1.0f);
  s.cards = with(sky_cards(), {"BZERO   = 32768"});
  write_fits(dir.file("b.fits"), s);
  const SkyImage b = read_sky_image(dir.file("b.fits"));
  EXPECT_EQ(b.pixels(0, 1), 0.0f);
  EXPECT_EQ(b.pixels(0, 2), 65535.0f);
}

// ---- Compression -------------------------------------------------------------------

TEST(FitsRead, GzipAndTileCompressed) {
  ScratchDir dir;
  FitsSpec plain = float_image(40, 30);
  plain.stored[17] = kNaN;
  write_fits(dir.file("plain.fits"), plain);
  // CFITSIO writes a gzip file when the name ends in .gz.
  write_fits(dir.file("zipped.fits.gz"), plain);
  {
    std::ifstream in(dir.file("zipped.fits.gz"), std::ios::binary);
    unsigned char m[2] = {0, 0};
    in.read(reinterpret_cast<char*>(m), 2);
    ASSERT_EQ(m[0], 0x1f);  // gzip magic (RFC 1952)
    ASSERT_EQ(m[1], 0x8b);
  }
  FitsSpec tiled = plain;
  tiled.compress = GZIP_1;  // lossless for floats (quantize level 0)
  write_fits(dir.file("tiled.fits"), tiled);
  FitsSpec rice;
  rice.bitpix = 16;
  rice.naxes = {40, 30};
  for (int i = 0; i < 1200; ++i) rice.stored.push_back((i * 37) % 2001 - 1000);
  rice.cards = with(sky_cards(), {"BSCALE  = 0.01", "BZERO   = 3.0"});
  rice.compress = RICE_1;
  const std::vector<double> rice_stored = rice.stored;
  write_fits(dir.file("rice.fits"), rice);

  const SkyImage a = read_sky_image(dir.file("plain.fits"));
  for (const char* n : {"zipped.fits.gz", "tiled.fits"}) {
    const SkyImage b = read_sky_image(dir.file(n));
    ASSERT_EQ(b.pixels.rows(), 30);
    ASSERT_EQ(b.pixels.cols(), 40);
    for (Eigen::Index i = 0; i < a.pixels.size(); ++i) {
      const float u = a.pixels.data()[i], v = b.pixels.data()[i];
      EXPECT_TRUE((std::isnan(u) && std::isnan(v)) || u == v) << n << " pixel " << i;
    }
    EXPECT_EQ(b.beam.maj_arcsec, a.beam.maj_arcsec);
    double r1, d1, r2, d2;
    a.wcs->pix_to_sky(3, 4, r1, d1);
    b.wcs->pix_to_sky(3, 4, r2, d2);
    EXPECT_EQ(r1, r2);
    EXPECT_EQ(d1, d2);
  }
  EXPECT_EQ(read_sky_image(dir.file("zipped.fits.gz")).object, "zipped");
  const SkyImage r = read_sky_image(dir.file("rice.fits"));
  for (int i = 0; i < 1200; ++i)
    EXPECT_FLOAT_EQ(r.pixels(i / 40, i % 40), static_cast<float>(3.0 + 0.01 * rice_stored[i]));
}

// ---- HDUs --------------------------------------------------------------------------

TEST(FitsRead, ExtensionsByNameAndNumber) {
  ScratchDir dir;
  const std::string path = dir.file("mef.fits");
  FitsSpec primary;
  primary.bitpix = 8;
  write_fits(path, primary);  // empty primary HDU
  FitsSpec e1 = float_image(5, 4);
  e1.cards.push_back("EXTNAME = 'FIRST'");
  write_fits(path, e1, true);
  FitsSpec e2 = float_image(5, 4);
  for (auto& v : e2.stored) v += 100.0;
  e2.cards.push_back("EXTNAME = 'SECOND'");
  write_fits(path, e2, true);
  {
    fitsfile* f = nullptr;
    int st = 0;
    fits_open_file(&f, path.c_str(), READWRITE, &st);
    char* ttype[] = {const_cast<char*>("FLUX")};
    char* tform[] = {const_cast<char*>("E")};
    fits_create_tbl(f, BINARY_TBL, 0, 1, ttype, tform, nullptr, "TAB", &st);
    fits_close_file(f, &st);
    ASSERT_EQ(st, 0);
  }
  ImageReadOptions o;
  EXPECT_FLOAT_EQ(read_sky_image(path, o).pixels(1, 2), 0.01f * 102);  // first image extension
  o.hdu = "2";
  EXPECT_FLOAT_EQ(read_sky_image(path, o).pixels(1, 2), 0.01f * 102);
  o.hdu = "3";
  EXPECT_FLOAT_EQ(read_sky_image(path, o).pixels(1, 2), 0.01f * 102 + 100.0f);
  o.hdu = "SECOND";
  EXPECT_FLOAT_EQ(read_sky_image(path, o).pixels(1, 2), 0.01f * 102 + 100.0f);
  o.hdu = "TAB";
  expect_message(read_error(path, o), path, "is a table, not an image");
  o.hdu = "4";
  expect_message(read_error(path, o), path, "is a table, not an image");
  o.hdu = "9";
  expect_message(read_error(path, o), path, "has no HDU 9");
  o.hdu = "NOPE";
  expect_message(read_error(path, o), path, "has no extension named 'NOPE'");
  o.hdu = "0";
  expect_message(read_error(path, o), path, "HDU number 0 is not valid");

  // An empty primary and no image at all.
  const std::string empty = dir.file("empty.fits");
  write_fits(empty, primary);
  expect_message(read_error(empty), empty, "holds no image");
}

// ---- Cubes -------------------------------------------------------------------------

FitsSpec cube(std::vector<long> naxes, const std::vector<std::string>& axis_cards) {
  FitsSpec s;
  s.bitpix = -32;
  s.naxes = naxes;
  long n = 1;
  for (long a : naxes) n *= a;
  const long plane = naxes[0] * naxes[1];
  for (long i = 0; i < n; ++i) s.stored.push_back(1000.0 * static_cast<double>(i / plane) + static_cast<double>(i % plane));
  s.cards = with(sky_cards(), axis_cards);
  return s;
}

TEST(FitsRead, CubesWithDegenerateAndChosenPlanes) {
  ScratchDir dir;
  // 3 axes, degenerate FREQ: no plane needed; frequency from the axis.
  const std::string c3 = dir.file("c3.fits");
  write_fits(c3, cube({6, 4, 1}, {"CTYPE3  = 'FREQ'", "CRVAL3  = 1.4E9", "CDELT3  = 1E6",
                                   "CRPIX3  = 1", "CUNIT3  = 'Hz'"}));
  SkyImage a = read_sky_image(c3);
  EXPECT_EQ(a.pixels.rows(), 4);
  EXPECT_EQ(a.pixels.cols(), 6);
  EXPECT_DOUBLE_EQ(a.freq_hz, 1.4e9);
  EXPECT_FLOAT_EQ(a.pixels(2, 3), 15.0f);

  // 4 axes: FREQ of 3 planes (MHz), STOKES degenerate.
  const std::string c4 = dir.file("c4.fits");
  write_fits(c4, cube({6, 4, 3, 1}, {"CTYPE3  = 'FREQ'", "CRVAL3  = 888.0", "CDELT3  = 16.0",
                                      "CRPIX3  = 1", "CUNIT3  = 'MHz'", "CTYPE4  = 'STOKES'",
                                      "CRVAL4  = 1", "CDELT4  = 1", "CRPIX4  = 1"}));
  expect_message(read_error(c4), c4, "axis 3 (FREQ) has 3 planes: choose one");
  ImageReadOptions o;
  o.plane = {2};
  a = read_sky_image(c4, o);
  EXPECT_FLOAT_EQ(a.pixels(1, 1), 2007.0f);
  EXPECT_DOUBLE_EQ(a.freq_hz, 920e6);  // Paper I: CRVAL3 + CDELT3 (p - CRPIX3), p = 3
  o.plane = {3};
  expect_message(read_error(c4, o), c4, "plane index 3 is outside 0..2");
  o.plane = {0, 0};
  expect_message(read_error(c4, o), c4, "gives 2 indices");

  // 4 axes, both extra axes non-degenerate.
  const std::string c22 = dir.file("c22.fits");
  write_fits(c22, cube({6, 4, 2, 2}, {"CTYPE3  = 'FREQ'", "CRVAL3  = 1.0", "CDELT3  = 0.5",
                                       "CRPIX3  = 1", "CUNIT3  = 'GHz'", "CTYPE4  = 'STOKES'"}));
  o.plane = {1};
  expect_message(read_error(c22, o), c22, "axis 4 (STOKES) has 2 planes");
  o.plane = {1, 1};
  a = read_sky_image(c22, o);
  EXPECT_FLOAT_EQ(a.pixels(0, 0), 3000.0f);  // plane index 1 + 2 x 1
  EXPECT_DOUBLE_EQ(a.freq_hz, 1.5e9);
  o.plane = {0, 1};
  EXPECT_FLOAT_EQ(read_sky_image(c22, o).pixels(0, 0), 2000.0f);

  // The 2-D header of a cube plane still maps the sky like the cube.
  const std::string out = dir.file("plane.fits");
  write_fits_image(out, a.pixels, a);
  const SkyImage b = read_sky_image(out);
  EXPECT_DOUBLE_EQ(b.freq_hz, 1.5e9);
  double r1, d1, r2, d2;
  a.wcs->pix_to_sky(5, 3, r1, d1);
  b.wcs->pix_to_sky(5, 3, r2, d2);
  EXPECT_LT(sep_deg(r1, d1, r2, d2), 1e-6 * kMas);

  // Five axes are refused.
  const std::string c5 = dir.file("c5.fits");
  write_fits(c5, cube({2, 2, 1, 1, 1}, {}));
  expect_message(read_error(c5), c5, "has 5 axes; 2 to 4 are supported");
}

TEST(FitsRead, OneByNImage) {
  ScratchDir dir;
  const std::string p = dir.file("column.fits");
  write_fits(p, [] {
    FitsSpec s = float_image(1, 7);
    s.cards = sky_cards(1, 4);
    return s;
  }());
  const SkyImage a = read_sky_image(p);
  EXPECT_EQ(a.pixels.rows(), 7);
  EXPECT_EQ(a.pixels.cols(), 1);
  EXPECT_FLOAT_EQ(a.pixels(6, 0), 6.0f);
  const std::string q = dir.file("row.fits");
  write_fits(q, float_image(9, 1));
  EXPECT_EQ(read_sky_image(q).pixels.rows(), 1);
  // One axis only is not an image plane.
  const std::string r = dir.file("line.fits");
  FitsSpec s = float_image(9, 1);
  s.naxes = {9};
  write_fits(r, s);
  expect_message(read_error(r), r, "has 1 axes; 2 to 4 are supported");
}

// ---- Units, beam, frequency ------------------------------------------------------------

TEST(FitsRead, BunitCases) {
  // Unit strings: FITS Standard 4.0 sec. 4.3 (products with '.', '*' or spaces,
  // one '/', exponents written after the unit, "beam-1"), REF-UNIT-05; SI prefixes
  // m = 1e-3, u = 1e-6 (REF-UNIT-05).
  ScratchDir dir;
  struct C {
    const char* bunit;  // nullptr: no BUNIT card
    double scale;       // 0: refused
  };
  const C cases[] = {{"Jy/beam", 1},       {"JY/BEAM", 1},        {"jy/beam", 1},         {"Jy/Beam", 1},
                     {"Jy/bm", 1},         {"Jy beam-1", 1},      {"beam-1 Jy", 1},       {"Jy.beam-1", 1},
                     {"Jy beam^-1", 1},    {"Jy*beam**-1", 1},    {"JY BEAM-1", 1},       {"mJy/beam", 1e-3},
                     {"uJy/beam", 1e-6},   {"mJy beam-1", 1e-3},  {"beam-1 mJy", 1e-3},   {"uJy beam-1", 1e-6},
                     {"beam-1 uJy", 1e-6},
                     {"MJy/sr", 0},        {"MJY/BEAM", 0},       {"MJy beam-1", 0},      {"Jy", 0},
                     {"beam-1", 0},        {"Jy beam", 0},        {"Jy/beam-1", 0},       {"Jy/beam/pixel", 0},
                     {"Jy beam-1 beam-1", 0}, {"kJy/beam", 0},    {"W/m2", 0},            {"k", 0},
                     {"", 0},              {nullptr, 0}};
  int k = 0;
  for (const C& c : cases) {
    const std::string p = dir.file("bunit" + std::to_string(k++) + ".fits");
    FitsSpec s = float_image(4, 3);
    s.cards = without(s.cards, "BUNIT");
    if (c.bunit) s.cards.push_back(std::string("BUNIT   = '") + c.bunit + "'");
    write_fits(p, s);
    const std::string shown = c.bunit ? c.bunit : "(none)";
    if (c.scale > 0) {
      const SkyImage im = read_sky_image(p);
      EXPECT_EQ(im.bunit, c.bunit);
      EXPECT_EQ(im.bunit_scale, c.scale) << shown;
      EXPECT_FLOAT_EQ(im.pixels(2, 3), static_cast<float>(2.03 * c.scale)) << shown;
      EXPECT_NE(im.bunit_rule.find("Jy/beam"), std::string::npos) << im.bunit_rule;
    } else {
      const std::string m = read_error(p);
      expect_message(m, p, (c.bunit && *c.bunit) ? "is not Jy/beam, K or Jy/pixel" : "has no BUNIT");
      EXPECT_NE(m.find("image.accept_bunit = true takes the values as Jy/beam without conversion"), std::string::npos)
          << m;
      ImageReadOptions o;
      o.accept_any_bunit = true;
      const SkyImage im = read_sky_image(p, o);
      EXPECT_EQ(im.bunit_scale, 1.0) << shown;
      EXPECT_FLOAT_EQ(im.pixels(2, 3), 2.03f);
      EXPECT_EQ(im.bunit_rule.rfind("not converted", 0), 0u) << im.bunit_rule;
    }
  }
  // The option named in the message is the reading command's own.
  const std::string p = dir.file("bunit_bands.fits");
  FitsSpec s = float_image(4, 3);
  s.cards = with(without(s.cards, "BUNIT"), {"BUNIT   = 'MJy/sr'"});
  write_fits(p, s);
  ImageReadOptions o;
  o.accept_bunit_option = "bands.accept_bunit";
  expect_message(read_error(p, o), p, "bands.accept_bunit = true");
}

TEST(FitsRead, BrightnessTemperatureToJyPerBeam) {
  // K -> Jy/beam by the Rayleigh-Jeans relation S = 2 k nu^2 T Omega_beam / c^2
  // (REF-UNIT-04; Wilson, Rohlfs & Huettemeister, Tools of Radio Astronomy), with
  // Omega_beam = pi maj min / (4 ln 2) (REF-GAUSS-03). Expected factors computed
  // with astropy.units brightness_temperature (astropy 5.2.1, REF-UNIT-04):
  // beam 7.2" x 5.4" (BMAJ 0.002, BMIN 0.0015 deg), 1.4 GHz: 1 K = 6.235457939103803e-05 Jy/beam.
  ScratchDir dir;
  const double per_kelvin = 6.235457939103803e-05;
  auto image = [&](const std::string& name, const std::string& bunit, const std::vector<std::string>& extra,
                   bool beam = true) {
    const std::string p = dir.file(name);
    FitsSpec s = float_image(4, 3);
    s.cards = with(without(s.cards, "BUNIT"), {"BUNIT   = '" + bunit + "'"});
    if (!beam) s.cards = without(without(without(s.cards, "BMAJ"), "BMIN"), "BPA");
    s.cards = with(s.cards, extra);
    write_fits(p, s);
    return p;
  };
  const std::string k = image("k.fits", "K", {"FREQ    = 1.4E9"});
  SkyImage im = read_sky_image(k);
  EXPECT_NEAR(im.bunit_scale, per_kelvin, 1e-12 * per_kelvin);
  EXPECT_FLOAT_EQ(im.pixels(2, 3), static_cast<float>(2.03 * per_kelvin));
  EXPECT_FLOAT_EQ(im.pixels(0, 1), static_cast<float>(0.01 * per_kelvin));
  EXPECT_NE(im.bunit_rule.find("Rayleigh-Jeans"), std::string::npos) << im.bunit_rule;
  EXPECT_EQ(im.bunit, "K");
  // mK: 1e-3 of it (SI prefix).
  im = read_sky_image(image("mk.fits", "mK", {"FREQ    = 1.4E9"}));
  EXPECT_NEAR(im.bunit_scale, 6.235457939103803e-08, 1e-12 * 6.235457939103803e-08);
  // The frequency from a spectral axis of the chosen plane (FITS WCS Paper I,
  // REF-FITS-04): CRVAL3 1.4 GHz at plane 0.
  im = read_sky_image(image("k_axis.fits", "K", {"CTYPE3  = 'FREQ'", "CRVAL3  = 1.4E9", "CRPIX3  = 1.0",
                                                 "CDELT3  = 1.0E6", "CUNIT3  = 'Hz'"}));
  EXPECT_NEAR(im.bunit_scale, per_kelvin, 1e-12 * per_kelvin);

  // Missing frequency or beam: refused, naming what is missing and the option.
  const std::string nofreq = image("k_nofreq.fits", "K", {});
  std::string m = read_error(nofreq);
  expect_message(m, nofreq, "has no observing frequency");
  EXPECT_NE(m.find("give image.freq_mhz"), std::string::npos) << m;
  const std::string nobeam = image("k_nobeam.fits", "K", {"FREQ    = 1.4E9"}, false);
  ImageReadOptions lax;
  lax.require_beam = false;
  m = read_error(nobeam, lax);
  expect_message(m, nobeam, "has no restoring beam (BMAJ/BMIN or a CLEAN HISTORY card); give image.beam_arcsec");
  // The options give what the header lacks.
  ImageReadOptions o;
  o.freq_hz_override = 1.4e9;
  EXPECT_NEAR(read_sky_image(nofreq, o).bunit_scale, per_kelvin, 1e-12 * per_kelvin);
  o = {};
  o.beam_override = Beam{7.2, 5.4, 30.0};
  EXPECT_NEAR(read_sky_image(nobeam, o).bunit_scale, per_kelvin, 1e-12 * per_kelvin);
  // The BUNIT override takes an unconvertible K image as it is.
  o = {};
  o.accept_any_bunit = true;
  im = read_sky_image(nofreq, o);
  EXPECT_EQ(im.bunit_scale, 1.0);
  EXPECT_FLOAT_EQ(im.pixels(2, 3), 2.03f);
  EXPECT_EQ(im.bunit_rule.rfind("not converted (no frequency)", 0), 0u) << im.bunit_rule;
}

TEST(FitsRead, JyPerPixelToJyPerBeam) {
  // Jy/pixel -> Jy/beam: x Omega_beam / Omega_pixel (REF-UNIT-06). Beam 7.2" x 5.4",
  // pixels 1.8" (CDELT 0.0005 deg): pi 7.2 5.4 / (4 ln 2) / 1.8^2 = 13.597080425481582
  // (computed with astropy.units, REF-GAUSS-03). The SIN pixel area a few pixels from
  // the reference point differs from CDELT^2 by ~1e-9 (Calabretta & Greisen 2002,
  // REF-FITS-04), and the area is taken by half-pixel differences: rel 1e-7.
  ScratchDir dir;
  const double beam_pixels = 13.597080425481582;
  for (const char* unit : {"Jy/pixel", "JY/PIXEL", "Jy/pix", "Jy pixel-1", "mJy/pixel"}) {
    const std::string p = dir.file(std::string("pix") + (unit[0] == 'm' ? "m" : "") + ".fits");
    FitsSpec s = float_image(4, 3);
    s.cards = with(without(s.cards, "BUNIT"), {std::string("BUNIT   = '") + unit + "'"});
    write_fits(p, s);
    const SkyImage im = read_sky_image(p);
    const double want = beam_pixels * (unit[0] == 'm' ? 1e-3 : 1.0);
    EXPECT_NEAR(im.bunit_scale, want, 1e-7 * want) << unit;
    EXPECT_NEAR(im.pixels(2, 3), 2.03 * want, 1e-6 * 2.03 * want) << unit;
    EXPECT_NE(im.bunit_rule.find("pixels per beam"), std::string::npos) << im.bunit_rule;
  }
  const std::string nobeam = dir.file("pix_nobeam.fits");
  FitsSpec s = float_image(4, 3);
  s.cards = with(without(without(without(without(s.cards, "BUNIT"), "BMAJ"), "BMIN"), "BPA"),
                 {"BUNIT   = 'Jy/pixel'"});
  write_fits(nobeam, s);
  ImageReadOptions lax;
  lax.require_beam = false;
  expect_message(read_error(nobeam, lax), nobeam, "needs the restoring beam to become Jy/beam");
}

TEST(FitsRead, BeamFromHistoryCards) {
  // AIPS-style HISTORY cards (REF-FITS-07), as VLA archive images carry them:
  // values in degrees; the last CLEAN card wins. 1.3889E-03 deg = 5.00004 arcsec.
  ScratchDir dir;
  const auto base = without(without(without(sky_cards(), "BMAJ"), "BMIN"), "BPA");
  const std::vector<std::string> history = {
      "HISTORY AIPS   IMAGR  BMAJ    =    0.00000E+00    / FWHM major axis of restoring beam",
      "HISTORY AIPS   CLEAN BMAJ=  2.0000E-03 BMIN=  1.5000E-03 BPA=  30.00",
      "HISTORY AIPS   CLEAN NITER=     1000 PRODUCT=1   / NORMAL",
      "HISTORY AIPS   CLEAN BMAJ=  1.3889E-03 BMIN=  1.3889E-03 BPA=   0.00",
      "HISTORY AIPS   IMNAME='3C286   ' IMCLASS='ICL001' IMSEQ=   1"};
  auto file = [&](const std::string& name, const std::vector<std::string>& cards) {
    const std::string p = dir.file(name);
    FitsSpec s = float_image(4, 3);
    s.cards = cards;
    write_fits(p, s);
    return p;
  };
  const std::string h = file("history.fits", with(base, history));
  SkyImage im = read_sky_image(h);
  EXPECT_NEAR(im.beam.maj_arcsec, 1.3889e-3 * 3600.0, 1e-9);
  EXPECT_NEAR(im.beam.min_arcsec, 1.3889e-3 * 3600.0, 1e-9);
  EXPECT_EQ(im.beam.pa_deg, 0.0);
  EXPECT_EQ(im.beam_origin, "history");
  // The written header of derived maps carries it as keywords.
  EXPECT_NE(im.wcs_header.find("BMAJ    = "), std::string::npos);

  // Keywords come first; then the override.
  im = read_sky_image(file("both.fits", with(sky_cards(), history)));
  EXPECT_NEAR(im.beam.maj_arcsec, 7.2, 1e-12);
  EXPECT_EQ(im.beam_origin, "keywords");
  ImageReadOptions o;
  o.beam_override = Beam{10.0, 8.0, 45.0};
  im = read_sky_image(h, o);
  EXPECT_EQ(im.beam.maj_arcsec, 10.0);
  EXPECT_EQ(im.beam_origin, "option");

  // An elliptical beam from one card; FORTRAN 'D' exponents.
  im = read_sky_image(file("ellipse.fits", with(base, {"HISTORY AIPS   CLEAN BMAJ=  2.0000D-03 BMIN=  1.5000D-03 BPA= -60.00"})));
  EXPECT_NEAR(im.beam.maj_arcsec, 7.2, 1e-9);
  EXPECT_NEAR(im.beam.min_arcsec, 5.4, 1e-9);
  EXPECT_NEAR(im.beam.pa_deg, 120.0, 1e-12);

  // A K image whose beam is only in HISTORY: converted with that beam.
  // astropy.units brightness_temperature (REF-UNIT-04): 5.00004" circular beam,
  // 1.4649 GHz -> 1 K = 4.389842530683263e-05 Jy/beam.
  auto kcards = with(without(base, "BUNIT"), {"BUNIT   = 'K'", "FREQ    = 1.4649E9"});
  im = read_sky_image(file("k_history.fits", with(kcards, history)));
  EXPECT_NEAR(im.bunit_scale, 4.389842530683263e-05, 1e-12 * 4.389842530683263e-05);
  EXPECT_EQ(im.beam_origin, "history");

  // A last card with a zero beam (a CLEAN without restoring beam): refused, naming the card.
  const std::string zero = file("zero.fits", with(base, {history[1], "HISTORY AIPS   CLEAN BMAJ=  0.0000E+00 BMIN=  0.0000E+00 BPA=   0.00"}));
  std::string m = read_error(zero);
  expect_message(m, zero, "HISTORY card ");
  EXPECT_NE(m.find("is not positive"), std::string::npos) << m;
  // HISTORY cards that are not a CLEAN's beam are not a beam.
  const std::string none = file("none.fits", with(base, {history[0], history[2]}));
  expect_message(read_error(none), none, "no HISTORY card of a CLEAN gives BMAJ= and BMIN=");
  ImageReadOptions lax;
  lax.require_beam = false;
  im = read_sky_image(none, lax);
  EXPECT_FALSE(im.beam.valid());
  EXPECT_EQ(im.beam_origin, "");
}

TEST(FitsRead, BeamCases) {
  ScratchDir dir;
  auto file = [&](const std::string& name, std::vector<std::string> cards) {
    const std::string p = dir.file(name);
    FitsSpec s = float_image(4, 3);
    s.cards = cards;
    write_fits(p, s);
    return p;
  };
  auto base = without(without(without(sky_cards(), "BMAJ"), "BMIN"), "BPA");
  // BMAJ/BMIN/BPA in degrees (REF-FITS-03): 0.002 deg = 7.2 arcsec.
  SkyImage im = read_sky_image(file("ok.fits", sky_cards()));
  EXPECT_NEAR(im.beam.maj_arcsec, 7.2, 1e-12);
  EXPECT_NEAR(im.beam.min_arcsec, 5.4, 1e-12);
  EXPECT_EQ(im.beam.pa_deg, 30.0);
  EXPECT_EQ(im.beam_origin, "keywords");

  const std::string missing = file("missing.fits", base);
  expect_message(read_error(missing), missing, "has no restoring beam (BMAJ missing");
  const std::string zero = file("zero.fits", with(base, {"BMAJ    = 0.0", "BMIN    = 0.0", "BPA     = 0.0"}));
  expect_message(read_error(zero), zero, "is not positive");
  const std::string neg = file("neg.fits", with(base, {"BMAJ    = 0.002", "BMIN    = -0.001", "BPA     = 0.0"}));
  expect_message(read_error(neg), neg, "is not positive");
  const std::string nopa = file("nopa.fits", with(base, {"BMAJ    = 0.002", "BMIN    = 0.001"}));
  expect_message(read_error(nopa), nopa, "no BPA");
  const std::string text = file("text.fits", with(base, {"BMAJ    = 'big'", "BMIN    = 0.001", "BPA     = 0.0"}));
  expect_message(read_error(text), text, "keyword BMAJ is not a number");

  ImageReadOptions o;
  o.beam_override = Beam{10.0, 8.0, 45.0};
  for (const auto& p : {missing, zero, nopa}) {
    im = read_sky_image(p, o);
    EXPECT_EQ(im.beam.maj_arcsec, 10.0);
    EXPECT_EQ(im.beam.pa_deg, 45.0);
  }
  im = read_sky_image(dir.file("ok.fits"), o);  // the override replaces the header's beam
  EXPECT_EQ(im.beam.maj_arcsec, 10.0);
  o.beam_override = Beam{5.0, 8.0, 0.0};  // min > maj: not a beam
  EXPECT_THROW(read_sky_image(missing, o), UsageError);

  ImageReadOptions lax;
  lax.require_beam = false;
  EXPECT_FALSE(read_sky_image(missing, lax).beam.valid());
  EXPECT_FALSE(read_sky_image(zero, lax).beam.valid());

  // Circular without BPA is fine; BMIN > BMAJ is the same ellipse turned by 90 deg.
  im = read_sky_image(file("circ.fits", with(base, {"BMAJ    = 0.002", "BMIN    = 0.002"})));
  EXPECT_NEAR(im.beam.maj_arcsec, 7.2, 1e-12);
  EXPECT_EQ(im.beam.pa_deg, 0.0);
  im = read_sky_image(file("swap.fits", with(base, {"BMAJ    = 0.001", "BMIN    = 0.002", "BPA     = 120.0"})));
  EXPECT_NEAR(im.beam.maj_arcsec, 7.2, 1e-12);
  EXPECT_NEAR(im.beam.min_arcsec, 3.6, 1e-12);
  EXPECT_NEAR(im.beam.pa_deg, 30.0, 1e-12);  // 120 + 90 = 210 = 30 (mod 180)
}

TEST(FitsRead, FrequencySources) {
  ScratchDir dir;
  auto freq_of = [&](const std::string& name, const std::vector<std::string>& extra,
                     std::optional<double> override_hz = std::nullopt) {
    const std::string p = dir.file(name);
    FitsSpec s = float_image(4, 3);
    s.cards = with(s.cards, extra);
    write_fits(p, s);
    ImageReadOptions o;
    o.freq_hz_override = override_hz;
    return read_sky_image(p, o).freq_hz;
  };
  EXPECT_TRUE(std::isnan(freq_of("none.fits", {})));
  EXPECT_EQ(freq_of("freq.fits", {"FREQ    = 1.3E9"}), 1.3e9);
  EXPECT_EQ(freq_of("restfrq.fits", {"RESTFRQ = 9.0E8"}), 9e8);
  EXPECT_EQ(freq_of("restfreq.fits", {"RESTFREQ= 3.0E9"}), 3e9);
  // A 2-D image whose header keeps the degenerate spectral axis keywords.
  EXPECT_DOUBLE_EQ(freq_of("axis.fits", {"CTYPE3  = 'FREQ'", "CRVAL3  = 1.25", "CUNIT3  = 'GHz'",
                                         "CRPIX3  = 1.0", "RESTFRQ = 1.0E9"}),
                   1.25e9);
  EXPECT_EQ(freq_of("ovr.fits", {"FREQ    = 1.3E9"}, 2.1e9), 2.1e9);
  const std::string bad = dir.file("badunit.fits");
  FitsSpec s = float_image(4, 3);
  s.cards = with(s.cards, {"CTYPE3  = 'FREQ'", "CRVAL3  = 1.25", "CUNIT3  = 'm/s'"});
  write_fits(bad, s);
  expect_message(read_error(bad), bad, "CUNIT3 'm/s' of the FREQ axis");
}

/// Appends a binary table EXTNAME = 'BEAMS' with columns BMAJ, BMIN, BPA (float64,
/// units as given), CHAN, POL (int32) to `path`.
void append_beam_table(const std::string& path, const std::vector<std::array<double, 5>>& rows,
                       const char* size_unit = "arcsec", bool with_pol = true) {
  fitsfile* f = nullptr;
  int st = 0;
  fits_open_file(&f, path.c_str(), READWRITE, &st);
  std::vector<std::string> names{"BMAJ", "BMIN", "BPA", "CHAN", "POL"}, forms{"1D", "1D", "1D", "1J", "1J"},
      units{size_unit, size_unit, "deg", "", ""};
  if (!with_pol) names.pop_back(), forms.pop_back(), units.pop_back();
  std::vector<char*> n, fo, un;
  for (auto& x : names) n.push_back(x.data());
  for (auto& x : forms) fo.push_back(x.data());
  for (auto& x : units) un.push_back(x.data());
  char extname[] = "BEAMS";
  fits_create_tbl(f, BINARY_TBL, 0, static_cast<int>(n.size()), n.data(), fo.data(), un.data(), extname, &st);
  for (std::size_t r = 0; r < rows.size(); ++r) {
    const LONGLONG row = static_cast<LONGLONG>(r + 1);
    for (int c = 0; c < 3; ++c) {
      double v = rows[r][static_cast<std::size_t>(c)];
      fits_write_col(f, TDOUBLE, c + 1, row, 1, 1, &v, &st);
    }
    for (int c = 3; c < static_cast<int>(n.size()); ++c) {
      int v = static_cast<int>(rows[r][static_cast<std::size_t>(c)]);
      fits_write_col(f, TINT, c + 1, row, 1, 1, &v, &st);
    }
  }
  fits_close_file(f, &st);
  ASSERT_EQ(st, 0) << "beam table of " << path;
}

TEST(FitsRead, PerPlaneBeamFromBeamTable) {
  // A beam table (REF-FITS-08): BMAJ, BMIN [arcsec], BPA [deg], CHAN, POL (0-based
  // planes along the spectral and the Stokes axis); the row of the plane measured.
  ScratchDir dir;
  const std::vector<std::string> axes = {"CTYPE3  = 'FREQ'", "CRVAL3  = 888.0", "CDELT3  = 16.0", "CRPIX3  = 1",
                                         "CUNIT3  = 'MHz'",  "CTYPE4  = 'STOKES'", "CRVAL4  = 1", "CDELT4  = 1",
                                         "CRPIX4  = 1"};
  const std::vector<std::array<double, 5>> rows = {
      {12.0, 10.0, 15.0, 0, 0}, {11.0, 9.0, -20.0, 1, 0}, {10.0, 8.0, 25.0, 2, 0}};
  auto make = [&](const std::string& name, bool keywords, const std::vector<std::array<double, 5>>& r,
                  const char* unit = "arcsec") {
    const std::string p = dir.file(name);
    FitsSpec s = cube({6, 4, 3, 1}, axes);
    if (!keywords) s.cards = without(without(without(s.cards, "BMAJ"), "BMIN"), "BPA");
    write_fits(p, s);
    append_beam_table(p, r, unit);
    return p;
  };
  const std::string t = make("table.fits", false, rows);
  ImageReadOptions o;
  o.plane = {1};
  SkyImage im = read_sky_image(t, o);
  EXPECT_DOUBLE_EQ(im.beam.maj_arcsec, 11.0);
  EXPECT_DOUBLE_EQ(im.beam.min_arcsec, 9.0);
  EXPECT_DOUBLE_EQ(im.beam.pa_deg, 160.0);  // -20 = 160 (mod 180)
  EXPECT_EQ(im.beam_origin, "beam_table");
  EXPECT_DOUBLE_EQ(im.freq_hz, 904e6);
  EXPECT_FLOAT_EQ(im.pixels(1, 1), 1007.0f);  // the pixels of the same plane
  o.plane = {2};
  im = read_sky_image(t, o);
  EXPECT_DOUBLE_EQ(im.beam.maj_arcsec, 10.0);
  EXPECT_DOUBLE_EQ(im.beam.pa_deg, 25.0);

  // The table's beam of the plane comes before the keywords' single beam.
  const std::string both = make("both.fits", true, rows);
  o.plane = {0};
  im = read_sky_image(both, o);
  EXPECT_DOUBLE_EQ(im.beam.maj_arcsec, 12.0);
  EXPECT_EQ(im.beam_origin, "beam_table");
  // Sizes in degrees (TUNIT).
  const std::string deg = make("deg.fits", false, {{0.003, 0.002, 40.0, 0, 0}, {0.003, 0.002, 40.0, 1, 0},
                                                   {0.003, 0.002, 40.0, 2, 0}}, "deg");
  im = read_sky_image(deg, o);
  EXPECT_NEAR(im.beam.maj_arcsec, 10.8, 1e-9);
  EXPECT_NEAR(im.beam.min_arcsec, 7.2, 1e-9);

  // No row for the plane, two rows for it, an unknown unit: refused, naming the table.
  const std::string gap = make("gap.fits", false, {rows[0], rows[2]});
  o.plane = {1};
  expect_message(read_error(gap, o), gap, "beam table BEAMS has no row for the plane measured (CHAN 1, POL 0)");
  const std::string twice = make("twice.fits", false, {rows[0], rows[1], rows[1]});
  expect_message(read_error(twice, o), twice, "beam table BEAMS has two rows (2 and 3) for CHAN 1, POL 0");
  const std::string unit = make("unit.fits", false, rows, "furlong");
  expect_message(read_error(unit, o), unit, "TUNIT1 'furlong' of BMAJ is not arcsec, arcmin, deg or rad");
  const std::string nopol = dir.file("nopol.fits");
  FitsSpec s = cube({6, 4, 3, 1}, axes);
  write_fits(nopol, s);
  append_beam_table(nopol, rows, "arcsec", false);
  expect_message(read_error(nopol, o), nopol, "beam table BEAMS has no column POL");
}

// ---- Bad files -----------------------------------------------------------------------

TEST(FitsReadBad, MissingNotFitsAndEmpty) {
  ScratchDir dir;
  const std::string missing = dir.file("nothere.fits");
  expect_message(read_error(missing), missing, "file not found");
  const std::string text = dir.file("text.fits");
  std::ofstream(text) << "ra,dec\n1,2\n";
  expect_message(read_error(text), text, "not a FITS file");
  const std::string empty = dir.file("empty.fits");
  std::ofstream(empty).close();
  expect_message(read_error(empty), empty, "is empty");
  expect_message(read_error(dir.path().string()), dir.path().string(), "is a folder");
  // gzip magic but not FITS inside.
  const std::string gz = dir.file("bad.fits.gz");
  {
    std::ofstream o(gz, std::ios::binary);
    const unsigned char junk[] = {0x1f, 0x8b, 0x08, 0x00, 0x00, 0x00, 0x00, 0x00, 0x00, 0x03, 0x01, 0x02};
    o.write(reinterpret_cast<const char*>(junk), sizeof junk);
  }
  expect_message(read_error(gz), gz, "cannot open as FITS");
}

TEST(FitsReadBad, TruncatedData) {
  ScratchDir dir;
  const std::string p = dir.file("trunc.fits");
  write_fits(p, float_image(100, 80));
  const auto full = fs::file_size(p);
  fs::resize_file(p, full - 2880 * 4 - 100);  // part of the data is gone
  const std::string m = read_error(p);
  expect_message(m, p, "truncated: the header declares 100 x 80 pixels of 4 bytes (32000 bytes of data)");
  // Only the header left.
  fs::resize_file(p, 2880);
  expect_message(read_error(p), p, "truncated");
  // Cut inside the header (FITS Standard 4.0 sec. 3.3.1: whole 2880-byte header blocks).
  fs::resize_file(p, 1000);
  expect_message(read_error(p), p, "is truncated: the file (1000 bytes) ends inside the primary header, before its END card");
}

TEST(FitsReadBad, HeaderLyingAboutAxisLengths) {
  ScratchDir dir;
  const std::string p = dir.file("liar.fits");
  write_raw_fits(p,
                 {raw_card("SIMPLE", "T"), raw_card("BITPIX", "-32"), raw_card("NAXIS", "2"),
                  raw_card("NAXIS1", "100000000"), raw_card("NAXIS2", "100"),
                  raw_card("CTYPE1", "'RA---SIN'"), raw_card("CTYPE2", "'DEC--SIN'"),
                  raw_card("BUNIT", "'Jy/beam'")},
                 2880);
  expect_message(read_error(p), p, "truncated: the header declares 100000000 x 100 pixels");
  // Axis lengths whose product overflows 64 bits.
  const std::string q = dir.file("overflow.fits");
  write_raw_fits(q,
                 {raw_card("SIMPLE", "T"), raw_card("BITPIX", "-64"), raw_card("NAXIS", "3"),
                  raw_card("NAXIS1", "4000000000"), raw_card("NAXIS2", "4000000000"),
                  raw_card("NAXIS3", "4000000000")},
                 2880);
  const std::string m = read_error(q);
  EXPECT_EQ(m.rfind(q + ": ", 0), 0u) << m;
  EXPECT_TRUE(m.find("overflow") != std::string::npos || m.find("cannot open") != std::string::npos) << m;
  EXPECT_EQ(m.find('\n'), std::string::npos);
}

TEST(FitsReadBad, PlaneLargerThanMemoryRefusedBeforeAllocating) {
  // A sparse file as long as the header says: the data are "there", but one plane
  // would not fit in this machine's memory. The reader must refuse from the header.
  ScratchDir dir;
  const std::string p = dir.file("huge.fits");
  const double mem = static_cast<double>(::sysconf(_SC_PHYS_PAGES)) * static_cast<double>(::sysconf(_SC_PAGESIZE));
  const long side = static_cast<long>(std::sqrt(2.0 * mem / 4.0)) + 1;  // plane = 2 x memory
  write_raw_fits(p,
                 {raw_card("SIMPLE", "T"), raw_card("BITPIX", "-32"), raw_card("NAXIS", "2"),
                  raw_card("NAXIS1", std::to_string(side)), raw_card("NAXIS2", std::to_string(side)),
                  raw_card("CTYPE1", "'RA---SIN'"), raw_card("CTYPE2", "'DEC--SIN'"),
                  raw_card("BUNIT", "'Jy/beam'")},
                 0);
  std::error_code ec;
  fs::resize_file(p, 2880 + static_cast<std::uintmax_t>(side) * side * 4, ec);
  if (ec) GTEST_SKIP() << "this file system cannot hold a sparse file of that length";
  expect_message(read_error(p), p, "more than this machine's");
}

TEST(FitsReadBad, NoCelestialWcsAndFk4) {
  ScratchDir dir;
  const std::string lin = dir.file("linear.fits");
  FitsSpec s = float_image(4, 3);
  s.cards = {"CTYPE1  = 'LINEAR'", "CTYPE2  = 'LINEAR'", "CRVAL1  = 0", "CRVAL2  = 0",
             "BUNIT   = 'Jy/beam'", "BMAJ    = 0.002", "BMIN    = 0.002", "BPA     = 0"};
  write_fits(lin, s);
  expect_message(read_error(lin), lin, "no celestial WCS on axes 1 and 2 (CTYPE1 = 'LINEAR'");
  const std::string none = dir.file("nowcs.fits");
  s.cards = {"BUNIT   = 'Jy/beam'", "BMAJ    = 0.002", "BMIN    = 0.002", "BPA     = 0"};
  write_fits(none, s);
  expect_message(read_error(none), none, "no celestial WCS");
  const std::string fk4 = dir.file("fk4.fits");
  s = float_image(4, 3);
  s.cards = with(without(s.cards, "RADESYS"), {"EQUINOX = 1950.0"});
  write_fits(fk4, s);
  expect_message(read_error(fk4), fk4, "celestial frame FK4 (EQUINOX 1950.0) is not supported");
}

TEST(FitsReadBad, AllBlankIsNoData) {
  ScratchDir dir;
  const std::string p = dir.file("nan.fits");
  FitsSpec s = float_image(5, 5);
  for (auto& v : s.stored) v = kNaN;
  write_fits(p, s);
  expect_message(read_error<NoDataError>(p), p, "every pixel of the image is blank");
  ImageReadOptions o;
  o.allow_all_blank = true;
  EXPECT_TRUE(read_sky_image(p, o).pixels.isNaN().all());
  const std::string q = dir.file("blank16.fits");
  FitsSpec t;
  t.bitpix = 16;
  t.naxes = {3, 3};
  t.stored.assign(9, -99);
  t.cards = with(sky_cards(), {"BLANK   = -99"});
  write_fits(q, t);
  expect_message(read_error<NoDataError>(q), q, "is blank");
}

// ---- Writing -------------------------------------------------------------------------

GridSpec small_grid() {
  GridSpec g;
  g.nx = 32;
  g.ny = 24;
  g.projection = "SIN";
  g.crval1_deg = 201.25;
  g.crval2_deg = -38.6;
  g.crpix1 = 16.5;
  g.crpix2 = 12.5;
  g.cdelt1_deg = -2.0 / 3600;
  g.cdelt2_deg = 2.0 / 3600;
  g.rotation_deg = 10.0;
  g.beam = Beam{12.0, 8.0, 35.0};
  g.freq_hz = 1.4e9;
  return g;
}

ImageF ramp_pixels(long nx, long ny) {
  ImageF p(ny, nx);
  for (long y = 0; y < ny; ++y)
    for (long x = 0; x < nx; ++x) p(y, x) = 1e-3f * static_cast<float>(x) - 2e-4f * static_cast<float>(y);
  return p;
}

std::vector<std::string> header_keys(const std::string& path) {
  fitsfile* f = nullptr;
  int st = 0, n = 0;
  fits_open_file(&f, path.c_str(), READONLY, &st);
  fits_get_hdrspace(f, &n, nullptr, &st);
  std::vector<std::string> keys;
  for (int i = 1; i <= n; ++i) {
    char card[FLEN_CARD];
    fits_read_record(f, i, card, &st);
    keys.push_back(std::string(card, 8));
  }
  fits_close_file(f, &st);
  return keys;
}

TEST(FitsWrite, RoundTripWithWcsBeamFrequencyAndCards) {
  ScratchDir dir;
  const GridSpec g = small_grid();
  ImageF px = ramp_pixels(g.nx, g.ny);
  px(3, 4) = std::numeric_limits<float>::quiet_NaN();
  const SkyImage like = make_sky_image(g, px, "SKDC Lanternfish");
  const std::string p = dir.file("out/map.fits");  // folder created on the way
  write_fits_image(p, px, like, "JY/BEAM", {{"ORIGIN", "'skerry'"}, {"NITER", "3"}});
  const SkyImage b = read_sky_image(p);
  ASSERT_EQ(b.pixels.rows(), g.ny);
  ASSERT_EQ(b.pixels.cols(), g.nx);
  for (Eigen::Index i = 0; i < px.size(); ++i) {
    const float u = px.data()[i], v = b.pixels.data()[i];
    EXPECT_TRUE((std::isnan(u) && std::isnan(v)) || u == v) << i;
  }
  EXPECT_EQ(b.bunit, "JY/BEAM");
  EXPECT_NEAR(b.beam.maj_arcsec, 12.0, 1e-12);
  EXPECT_NEAR(b.beam.min_arcsec, 8.0, 1e-12);
  EXPECT_NEAR(b.beam.pa_deg, 35.0, 1e-12);
  EXPECT_EQ(b.freq_hz, 1.4e9);
  EXPECT_EQ(b.frame, "ICRS");
  for (double y : {0.0, 11.5, 23.0})
    for (double x : {0.0, 15.5, 31.0}) {
      double r1, d1, r2, d2;
      ASSERT_TRUE(like.wcs->pix_to_sky(x, y, r1, d1));
      ASSERT_TRUE(b.wcs->pix_to_sky(x, y, r2, d2));
      EXPECT_LT(sep_deg(r1, d1, r2, d2), 1e-6 * kMas);
    }
  const auto keys = header_keys(p);
  auto has = [&](const std::string& k) {
    std::string kk = k;
    kk.resize(8, ' ');
    return std::count(keys.begin(), keys.end(), kk);
  };
  EXPECT_EQ(has("ORIGIN"), 1);
  EXPECT_EQ(has("NITER"), 1);
  EXPECT_EQ(has("BUNIT"), 1);
  EXPECT_EQ(has("NAXIS"), 1);
  EXPECT_EQ(has("DATE"), 0);  // no time stamps in outputs (determinism)
  // Rewriting with an extra card replaces the header's card of that key.
  write_fits_image(p, px, b, "mJy/beam", {{"BMAJ", fits_real(0.01)}});
  EXPECT_NEAR(read_sky_image(p).beam.maj_arcsec, 36.0, 1e-9);
  const auto keys2 = header_keys(p);
  EXPECT_EQ(std::count(keys2.begin(), keys2.end(), std::string("BMAJ    ")), 1);
  EXPECT_EQ(read_sky_image(p).bunit_scale, 1e-3);
}

TEST(FitsWrite, ByteIdenticalRewrites) {
  ScratchDir dir;
  const GridSpec g = small_grid();
  const ImageF px = ramp_pixels(g.nx, g.ny);
  const SkyImage like = make_sky_image(g, px);
  write_fits_image(dir.file("a.fits"), px, like);
  write_fits_image(dir.file("b.fits"), px, like);
  std::ifstream a(dir.file("a.fits"), std::ios::binary), b(dir.file("b.fits"), std::ios::binary);
  const std::string sa((std::istreambuf_iterator<char>(a)), {}), sb((std::istreambuf_iterator<char>(b)), {});
  EXPECT_EQ(sa.size() % 2880, 0u);
  EXPECT_EQ(sa, sb);
}

TEST(FitsWrite, LabelsAreInt32) {
  ScratchDir dir;
  const GridSpec g = small_grid();
  LabelsI32 lab(g.ny, g.nx);
  for (Eigen::Index i = 0; i < lab.size(); ++i) lab.data()[i] = static_cast<std::int32_t>(i * 2654435761u % 2147483647u);
  lab(0, 0) = 0;
  lab(1, 1) = (1 << 30) + 5;  // not representable in float32: must stay exact
  const std::string p = dir.file("labels.fits");
  write_fits_labels(p, lab, make_sky_image(g, ImageF::Zero(g.ny, g.nx)));
  fitsfile* f = nullptr;
  int st = 0, bitpix = 0;
  fits_open_file(&f, p.c_str(), READONLY, &st);
  fits_get_img_type(f, &bitpix, &st);
  EXPECT_EQ(bitpix, 32);
  std::vector<int> v(static_cast<std::size_t>(lab.size()));
  int anynul = 0;
  fits_read_img(f, TINT, 1, static_cast<LONGLONG>(v.size()), nullptr, v.data(), &anynul, &st);
  char bunit[FLEN_VALUE];
  int st2 = 0;
  fits_read_key(f, TSTRING, "BUNIT", bunit, nullptr, &st2);
  EXPECT_EQ(st2, KEY_NO_EXIST);
  fits_close_file(f, &st);
  fits_clear_errmsg();
  ASSERT_EQ(st, 0);
  for (Eigen::Index i = 0; i < lab.size(); ++i) EXPECT_EQ(v[static_cast<std::size_t>(i)], lab.data()[i]);
}

// The data unit is written by skerry's own writer (O_DIRECT for the aligned
// middle, buffered head and tail; see write_data_unit in fits_image.cpp). The
// external check is CFITSIO's fits_write_img: the same header and pixels written
// by CFITSIO must give a byte-identical file (FITS Standard 4.0, REF-FITS-02:
// big-endian IEEE-754 / two's complement, zero padding to 2880 bytes).
std::string file_bytes(const std::string& p) {
  std::ifstream in(p, std::ios::binary);
  return std::string((std::istreambuf_iterator<char>(in)), {});
}

std::string cfitsio_rewrite(const std::string& src, const std::string& dst, int datatype, void* pixels,
                            long long n) {
  fitsfile* in = nullptr;
  fitsfile* out = nullptr;
  int st = 0;
  fs::remove(dst);
  fits_open_file(&in, src.c_str(), READONLY, &st);
  fits_create_diskfile(&out, dst.c_str(), &st);
  fits_copy_header(in, out, &st);
  fits_write_img(out, datatype, 1, n, pixels, &st);
  fits_close_file(out, &st);
  fits_close_file(in, &st);
  EXPECT_EQ(st, 0) << "CFITSIO status " << st;
  return file_bytes(dst);
}

TEST(FitsWrite, DataUnitMatchesCfitsioWriterByteForByte) {
  ScratchDir dir;
  // Sizes: one pixel; smaller than one 4096-byte page; a few pages with an
  // unaligned tail; more than one 8 MiB chunk of the writer (1537 x 1531 x 4 B).
  const std::vector<std::pair<long, long>> shapes = {{1, 1}, {31, 24}, {1000, 7}, {1537, 1531}};
  std::vector<std::string> folders = {fs::path(dir.file("x")).parent_path().string()};
  if (fs::is_directory("/dev/shm")) folders.push_back("/dev/shm");  // tmpfs: may refuse O_DIRECT
  for (const bool buffered : {false, true}) {
    // The fallback path, as on a file system without O_DIRECT.
    if (buffered) ::setenv("SKERRY_NO_DIRECT_IO", "1", 1);
    for (const auto& folder : folders) {
      for (const auto& [nx, ny] : shapes) {
        SCOPED_TRACE(folder + " " + std::to_string(nx) + " x " + std::to_string(ny) +
                     (buffered ? " buffered" : " direct"));
        GridSpec g = small_grid();
        g.nx = nx;
        g.ny = ny;
        ImageF px(ny, nx);
        for (Eigen::Index i = 0; i < px.size(); ++i) px.data()[i] = static_cast<float>(std::sin(0.37 * i)) * 1e-3f;
        px.data()[px.size() - 1] = std::numeric_limits<float>::quiet_NaN();
        if (px.size() > 3) {
          px.data()[1] = -0.0f;
          px.data()[2] = std::numeric_limits<float>::infinity();
          px.data()[3] = std::numeric_limits<float>::denorm_min();
        }
        const SkyImage like = make_sky_image(g, px);
        const std::string tag = std::to_string(::getpid()) + "-" + std::to_string(nx) + "x" + std::to_string(ny);
        const std::string ours = folder + "/skerry-ours-" + tag + ".fits";
        const std::string ref = folder + "/skerry-ref-" + tag + ".fits";
        write_fits_image(ours, px, like);
        const std::string a = file_bytes(ours);
        const std::string b = cfitsio_rewrite(ours, ref, TFLOAT, px.data(), px.size());
        EXPECT_EQ(a.size() % 2880, 0u);
        EXPECT_EQ(a.size(), b.size());
        EXPECT_TRUE(a == b) << "float32 data unit differs from CFITSIO's";

        LabelsI32 lab(ny, nx);
        for (Eigen::Index i = 0; i < lab.size(); ++i)
          lab.data()[i] = static_cast<std::int32_t>((i * 2654435761u) ^ 0x80000001u);
        write_fits_labels(ours, lab, like);
        const std::string c = file_bytes(ours);
        const std::string d = cfitsio_rewrite(ours, ref, TINT, lab.data(), lab.size());
        EXPECT_EQ(c.size(), d.size());
        EXPECT_TRUE(c == d) << "int32 data unit differs from CFITSIO's";
        fs::remove(ours);
        fs::remove(ref);
      }
    }
  }
  ::unsetenv("SKERRY_NO_DIRECT_IO");
}

TEST(FitsWrite, RenameFailureLeavesNothing) {
  ScratchDir dir;
  const GridSpec g = small_grid();
  const ImageF px = ramp_pixels(g.nx, g.ny);
  const SkyImage like = make_sky_image(g, px);
  const std::string target = dir.file("taken.fits");
  fs::create_directories(target + "/inside");  // a non-empty folder where the file should go
  try {
    write_fits_image(target, px, like);
    ADD_FAILURE() << "no error";
  } catch (const OutputError& e) {
    EXPECT_EQ(std::string(e.what()).rfind(target + ": ", 0), 0u) << e.what();
  }
  const auto names = dir.entries();
  ASSERT_EQ(names.size(), 1u);
  EXPECT_EQ(names[0], "taken.fits");
  EXPECT_TRUE(fs::is_directory(target));
  // Bad extra cards and empty images are refused before anything is written.
  EXPECT_THROW(write_fits_image(dir.file("x.fits"), px, like, "JY/BEAM", {{"lower", "1"}}), OutputError);
  EXPECT_THROW(write_fits_image(dir.file("y.fits"), ImageF(0, 0), like), OutputError);
  EXPECT_EQ(dir.entries().size(), 1u);
}

TEST(FitsWrite, FileSizeLimitGivesOutputErrorAndNoFile) {
  // Disk full, simulated with RLIMIT_FSIZE in a child process (SIGXFSZ ignored so
  // that write() fails with EFBIG, as on a full disk it fails with ENOSPC).
  ScratchDir dir;
  const std::string target = dir.file("big.fits");
  const pid_t pid = ::fork();
  ASSERT_GE(pid, 0);
  if (pid == 0) {
    ::signal(SIGXFSZ, SIG_IGN);
    struct rlimit rl;
    rl.rlim_cur = rl.rlim_max = 64 * 1024;
    ::setrlimit(RLIMIT_FSIZE, &rl);
    int code = 1;
    try {
      GridSpec g = small_grid();
      g.nx = g.ny = 300;  // 360 kB of pixels
      const ImageF px = ImageF::Constant(300, 300, 1.0f);
      write_fits_image(target, px, make_sky_image(g, px));
    } catch (const OutputError& e) {
      const std::string m = e.what();
      code = (m.rfind(target + ": ", 0) == 0 && m.find('\n') == std::string::npos) ? 0 : 2;
    } catch (...) {
      code = 3;
    }
    ::_exit(code);
  }
  int status = 0;
  ASSERT_EQ(::waitpid(pid, &status, 0), pid);
  ASSERT_TRUE(WIFEXITED(status));
  EXPECT_EQ(WEXITSTATUS(status), 0) << "1: no error, 2: message shape, 3: other exception";
  EXPECT_TRUE(dir.entries().empty()) << "left behind: " << (dir.entries().empty() ? "" : dir.entries()[0]);
}

// ---- Primary beam --------------------------------------------------------------------

TEST(FitsRead, PrimaryBeam) {
  ScratchDir dir;
  GridSpec g = small_grid();
  const ImageF px = ramp_pixels(g.nx, g.ny);
  const SkyImage like = make_sky_image(g, px);
  ImageF pb = ImageF::Constant(g.ny, g.nx, 0.5f);
  pb(0, 0) = 0.0f;
  pb(1, 0) = 1.0f;
  write_fits_image(dir.file("pb.fits"), pb, like, "");
  const ImageF got = read_primary_beam(dir.file("pb.fits"), like);
  EXPECT_TRUE(std::isnan(got(0, 0)));  // zero gain: no data
  EXPECT_EQ(got(1, 0), 1.0f);
  EXPECT_EQ(got(5, 5), 0.5f);

  GridSpec shifted = g;
  shifted.crpix1 += 0.5;
  write_fits_image(dir.file("shift.fits"), pb, make_sky_image(shifted, pb), "");
  expect_message([&] {
    try { read_primary_beam(dir.file("shift.fits"), like); } catch (const InputError& e) { return std::string(e.what()); }
    return std::string();
  }(), dir.file("shift.fits"), "not on the image's pixel grid");

  GridSpec other = g;
  other.nx = 10;
  const ImageF small = ImageF::Constant(g.ny, 10, 0.5f);
  write_fits_image(dir.file("small.fits"), small, make_sky_image(other, small), "");
  EXPECT_THROW(read_primary_beam(dir.file("small.fits"), like), InputError);

  pb(2, 2) = 1.5f;
  write_fits_image(dir.file("gain.fits"), pb, like, "");
  EXPECT_THROW(read_primary_beam(dir.file("gain.fits"), like), InputError);
}

TEST(FitsRead, ConcurrentReadsAgree) {
  ScratchDir dir;
  const std::string p = dir.file("c.fits.gz");
  write_fits(p, float_image(64, 64));
  const SkyImage ref = read_sky_image(p);
  std::vector<int> bad(4, 0);
  std::vector<std::thread> ts;
  for (int t = 0; t < 4; ++t)
    ts.emplace_back([&, t] {
      for (int k = 0; k < 5; ++k) {
        const SkyImage im = read_sky_image(p);
        if (!(im.pixels == ref.pixels).all()) ++bad[t];
      }
    });
  for (auto& t : ts) t.join();
  for (int b : bad) EXPECT_EQ(b, 0);
}

}  // namespace
}  // namespace skerry
