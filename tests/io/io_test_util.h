#pragma once
// Helpers for the io tests: a scratch folder per test, FITS files written with
// CFITSIO directly (not through the code under test), raw header blocks, and
// the closed-form zenithal/cylindrical projections of Calabretta & Greisen 2002
// (A&A 395, 1077, "Paper II") used as references that share no code with WCSLIB.
#include <erfa.h>
#include <fitsio.h>
#include <gtest/gtest.h>
#include <unistd.h>

#include <cmath>
#include <cstdint>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <stdexcept>
#include <string>
#include <utility>
#include <vector>

namespace skerry::iotest {

namespace fs = std::filesystem;

inline constexpr double kD2R = 3.14159265358979323846 / 180.0;
inline constexpr double kR2D = 180.0 / 3.14159265358979323846;

/// A fresh folder under the system temporary folder, removed afterwards.
class ScratchDir {
 public:
  ScratchDir() {
    const auto* info = ::testing::UnitTest::GetInstance()->current_test_info();
    std::string name = std::string("skerry-io-") + (info ? info->name() : "x") + "-" +
                       std::to_string(::getpid());
    for (char& c : name)
      if (c == '/') c = '_';
    path_ = fs::temp_directory_path() / name;
    fs::remove_all(path_);
    fs::create_directories(path_);
  }
  ~ScratchDir() {
    std::error_code ec;
    fs::remove_all(path_, ec);
  }
  std::string file(const std::string& n) const { return (path_ / n).string(); }
  const fs::path& path() const { return path_; }
  /// Names of the entries in the folder.
  std::vector<std::string> entries() const {
    std::vector<std::string> out;
    for (const auto& e : fs::directory_iterator(path_)) out.push_back(e.path().filename().string());
    return out;
  }

 private:
  fs::path path_;
};

/// A header card parsed by CFITSIO's template parser ("KEY = value / comment").
inline void write_template_card(fitsfile* f, const std::string& text, int* status) {
  char card[FLEN_CARD];
  int type = 0;
  std::vector<char> t(text.begin(), text.end());
  t.push_back('\0');
  fits_parse_template(t.data(), card, &type, status);
  fits_write_record(f, card, status);
}

/// Standard cards of a small celestial image that the reader accepts.
inline std::vector<std::string> sky_cards(double crpix1 = 10, double crpix2 = 8) {
  return {"CTYPE1  = 'RA---SIN'",
          "CTYPE2  = 'DEC--SIN'",
          "CRVAL1  = 201.25",
          "CRVAL2  = -38.6",
          "CRPIX1  = " + std::to_string(crpix1),
          "CRPIX2  = " + std::to_string(crpix2),
          "CDELT1  = -0.0005",
          "CDELT2  = 0.0005",
          "CUNIT1  = 'deg'",
          "CUNIT2  = 'deg'",
          "RADESYS = 'ICRS'",
          "BUNIT   = 'Jy/beam'",
          "BMAJ    = 0.002",
          "BMIN    = 0.0015",
          "BPA     = 30.0"};
}

struct FitsSpec {
  int bitpix = -32;
  std::vector<long> naxes;
  /// Stored (raw) values in FITS order; written without scaling, so BSCALE/BZERO
  /// cards in `cards` apply on reading only.
  std::vector<double> stored;
  std::vector<std::string> cards;
  int compress = 0;  ///< CFITSIO compression type (RICE_1, GZIP_1, ...), 0 = none
};

/// Writes one image HDU (primary unless `append`) with CFITSIO.
inline void write_fits(const std::string& path, const FitsSpec& s, bool append = false) {
  fitsfile* f = nullptr;
  int st = 0;
  if (append) {
    fits_open_file(&f, path.c_str(), READWRITE, &st);
  } else {
    fs::remove(path);
    fits_create_file(&f, path.c_str(), &st);
  }
  if (s.compress) {
    fits_set_compression_type(f, s.compress, &st);
    if (s.bitpix < 0) fits_set_quantize_level(f, 0.0, &st);  // lossless for floats
  }
  std::vector<long> ax = s.naxes;
  fits_create_img(f, s.bitpix, static_cast<int>(ax.size()), ax.empty() ? nullptr : ax.data(), &st);
  for (const auto& c : s.cards) write_template_card(f, c, &st);
  if (!s.stored.empty()) {
    fits_set_bscale(f, 1.0, 0.0, &st);  // write raw stored values
    // Native types (CFITSIO refuses implicit conversion into compressed images).
    const LONGLONG n = static_cast<LONGLONG>(s.stored.size());
    auto put = [&](auto tag, int type) {
      using T = decltype(tag);
      std::vector<T> v(s.stored.begin(), s.stored.end());
      fits_write_img(f, type, 1, n, v.data(), &st);
    };
    switch (s.bitpix) {
      case 8: put(static_cast<unsigned char>(0), TBYTE); break;
      case 16: put(static_cast<short>(0), TSHORT); break;
      case 32: put(0, TINT); break;
      case 64: put(static_cast<LONGLONG>(0), TLONGLONG); break;
      case -32: put(0.0f, TFLOAT); break;
      default: put(0.0, TDOUBLE); break;
    }
  }
  fits_close_file(f, &st);
  if (st) {
    char t[FLEN_STATUS];
    fits_get_errstatus(st, t);
    throw std::runtime_error("test FITS writer failed for " + path + ": " + t);
  }
}

/// A 2-D float image spec of nx x ny with value(x, y) = 0.01 * (x + 100 y).
inline FitsSpec float_image(long nx, long ny) {
  FitsSpec s;
  s.bitpix = -32;
  s.naxes = {nx, ny};
  for (long y = 0; y < ny; ++y)
    for (long x = 0; x < nx; ++x) s.stored.push_back(0.01 * static_cast<double>(x + 100 * y));
  s.cards = sky_cards();
  return s;
}

/// Raw FITS bytes: header cards padded to 80 characters, END, 2880-byte blocks,
/// then `data_bytes` zero bytes (not padded). For headers CFITSIO would not write.
inline void write_raw_fits(const std::string& path, const std::vector<std::string>& cards,
                           std::size_t data_bytes) {
  std::string h;
  for (std::string c : cards) {
    c.resize(80, ' ');
    h += c;
  }
  std::string end = "END";
  end.resize(80, ' ');
  h += end;
  h.resize((h.size() + 2879) / 2880 * 2880, ' ');
  std::ofstream o(path, std::ios::binary);
  o << h << std::string(data_bytes, '\0');
}

/// Card text "KEY     = value" with the key padded to 8 characters.
inline std::string raw_card(const std::string& key, const std::string& value) {
  std::string k = key;
  k.resize(8, ' ');
  std::string v = value;
  if (!v.empty() && v[0] != '\'' && v.size() < 20) v = std::string(20 - v.size(), ' ') + v;
  return k + "= " + v;
}

// ---- Closed-form projections (Calabretta & Greisen 2002, Paper II) ----------------
//
// Zenithal projections with the reference point at the native pole and the
// default LONPOLE = 180 deg (Paper II sect. 2: the spherical rotation between
// native (phi, theta) and celestial (alpha, delta) with (alpha_p, delta_p) =
// (CRVAL1, CRVAL2), phi_p = 180 deg; sect. 5.1: the zenithal projections). All
// angles in degrees. (Equation numbers quoted below are from memory; the formulas
// were re-derived here, e.g. AZP's inverse from R = (180/pi)(mu+1)cos t/(mu+sin t).)

enum class Zen { SIN, TAN, ZEA, ARC, STG, AZP };

struct Zenithal {
  Zen kind = Zen::SIN;
  double a0 = 0, d0 = 0;   ///< CRVAL1, CRVAL2 [deg]
  double mu = 0;           ///< AZP: PV2_1
  double xi = 0, eta = 0;  ///< SIN: PV2_1, PV2_2 (generalised SIN)

  /// R_theta [deg] of native latitude theta (Paper II sect. 5.1: AZP with gamma = 0,
  /// TAN, SIN, ARC, ZEA, STG).
  double r_of_theta(double theta) const {
    const double t = theta * kD2R;
    switch (kind) {
      case Zen::SIN: return kR2D * std::cos(t);
      case Zen::TAN: return kR2D * std::cos(t) / std::sin(t);
      case Zen::ZEA: return kR2D * std::sqrt(2.0 * (1.0 - std::sin(t)));
      case Zen::ARC: return 90.0 - theta;
      case Zen::STG: return 2.0 * kR2D * std::cos(t) / (1.0 + std::sin(t));
      case Zen::AZP: return kR2D * (mu + 1.0) * std::cos(t) / (mu + std::sin(t));
    }
    return 0;
  }
  /// Inverse of r_of_theta (AZP: theta = psi - omega, the solution nearer the pole).
  double theta_of_r(double r) const {
    switch (kind) {
      case Zen::SIN: return std::acos(r * kD2R) * kR2D;
      case Zen::TAN: return std::atan2(kR2D, r) * kR2D;
      case Zen::ZEA: return 90.0 - 2.0 * std::asin(r * kD2R / 2.0) * kR2D;
      case Zen::ARC: return 90.0 - r;
      case Zen::STG: return 90.0 - 2.0 * std::atan(r * kD2R / 2.0) * kR2D;
      case Zen::AZP: {
        // rho = R/(mu+1) [rad] = cos t/(mu + sin t) => cos(t + atan rho) =
        // rho mu / sqrt(1 + rho^2); with psi = atan(1/rho), omega = asin(rho mu /
        // sqrt(rho^2 + 1)): theta = psi - omega (Paper II sect. 5.1.1).
        const double rho = r * kD2R / (mu + 1.0);
        const double psi = std::atan2(1.0, rho);
        const double omega = std::asin(rho * mu / std::sqrt(rho * rho + 1.0));
        return (psi - omega) * kR2D;
      }
    }
    return 0;
  }

  /// Celestial -> intermediate world coordinates (x, y) [deg].
  void s2x(double a, double d, double& x, double& y) const {
    const double ad = (a - a0) * kD2R, dr = d * kD2R, dp = d0 * kD2R;
    // Paper II sect. 2 (celestial -> native rotation): native (phi, theta).
    const double phi = 180.0 + std::atan2(-std::cos(dr) * std::sin(ad),
                                          std::sin(dr) * std::cos(dp) -
                                              std::cos(dr) * std::sin(dp) * std::cos(ad)) * kR2D;
    const double theta = std::asin(std::sin(dr) * std::sin(dp) +
                                   std::cos(dr) * std::cos(dp) * std::cos(ad)) * kR2D;
    if (kind == Zen::SIN && (xi != 0.0 || eta != 0.0)) {
      // Generalised SIN (Paper II sect. 5.1.5):
      //   x = 180/pi [cos(theta) sin(phi) + xi (1 - sin(theta))]
      //   y = -180/pi [cos(theta) cos(phi) - eta (1 - sin(theta))]
      const double t = theta * kD2R, p = phi * kD2R;
      x = kR2D * (std::cos(t) * std::sin(p) + xi * (1.0 - std::sin(t)));
      y = -kR2D * (std::cos(t) * std::cos(p) - eta * (1.0 - std::sin(t)));
      return;
    }
    const double r = r_of_theta(theta);
    x = r * std::sin(phi * kD2R);   // Paper II sect. 5.1: x = R sin(phi)
    y = -r * std::cos(phi * kD2R);  //                  y = -R cos(phi)
  }
  /// Intermediate (x, y) [deg] -> celestial (not for generalised SIN).
  void x2s(double x, double y, double& a, double& d) const {
    const double r = std::hypot(x, y);
    const double phi = std::atan2(x, -y) * kR2D;  // phi = arg(-y, x)
    const double theta = theta_of_r(r);
    // Paper II sect. 2 (native -> celestial rotation).
    const double t = theta * kD2R, dp = d0 * kD2R, dphi = (phi - 180.0) * kD2R;
    const double aa = std::atan2(-std::cos(t) * std::sin(dphi),
                                 std::sin(t) * std::cos(dp) - std::cos(t) * std::sin(dp) * std::cos(dphi));
    a = std::fmod(a0 + aa * kR2D + 720.0, 360.0);
    d = std::asin(std::sin(t) * std::sin(dp) + std::cos(t) * std::cos(dp) * std::cos(dphi)) * kR2D;
  }
};

/// Linear part (Paper I sect. 2, CD form): intermediate (x, y) [deg] of 1-based pixel.
struct Linear {
  double crpix1 = 0, crpix2 = 0;
  double cd[2][2] = {{1, 0}, {0, 1}};
  void p2x(double p1, double p2, double& x, double& y) const {
    const double u = p1 - crpix1, v = p2 - crpix2;
    x = cd[0][0] * u + cd[0][1] * v;
    y = cd[1][0] * u + cd[1][1] * v;
  }
  void x2p(double x, double y, double& p1, double& p2) const {
    const double det = cd[0][0] * cd[1][1] - cd[0][1] * cd[1][0];
    p1 = crpix1 + (cd[1][1] * x - cd[0][1] * y) / det;
    p2 = crpix2 + (-cd[1][0] * x + cd[0][0] * y) / det;
  }
};

/// Great-circle separation [deg] with ERFA (eraSeps).
inline double sep_deg(double a1, double d1, double a2, double d2) {
  return eraSeps(a1 * kD2R, d1 * kD2R, a2 * kD2R, d2 * kD2R) * kR2D;
}

inline constexpr double kMas = 1.0 / 3.6e6;  ///< one milliarcsecond [deg]

/// Galactic (l, b) -> FK5 J2000 by the spherical-trigonometry formulas (e.g. the
/// Explanatory Supplement to the Astronomical Almanac, Galactic coordinates; from
/// memory) with the pole of Murray 1989 (A&A 218, 325):
///   sin d = sin b sin dP + cos b cos dP cos(theta - l)
///   cos d sin(a - aP) = cos b sin(theta - l)
///   cos d cos(a - aP) = sin b cos dP - cos b sin dP cos(theta - l)
/// then FK5 -> ICRS with ERFA eraFk52h (zero proper motion). Degrees in and out.
inline void galactic_to_icrs_reference(double l, double b, double& ra, double& dec) {
  const double aP = 192.8594812065348 * kD2R, dP = 27.12825118085622 * kD2R,
               theta = 122.9319185680026 * kD2R;
  const double lr = l * kD2R, br = b * kD2R;
  const double sd = std::sin(br) * std::sin(dP) + std::cos(br) * std::cos(dP) * std::cos(theta - lr);
  const double y = std::cos(br) * std::sin(theta - lr);
  const double x = std::sin(br) * std::cos(dP) - std::cos(br) * std::sin(dP) * std::cos(theta - lr);
  const double a5 = aP + std::atan2(y, x), d5 = std::asin(sd);
  double ah, dh, x1, x2, x3, x4;
  eraFk52h(a5, d5, 0, 0, 0, 0, &ah, &dh, &x1, &x2, &x3, &x4);
  ra = eraAnp(ah) * kR2D;
  dec = dh * kR2D;
}

/// PA (east of north) [deg] of the direction from point c towards point `up`, the
/// mean of ERFA eraPas towards `up` and (+180 deg) towards `down`, the points a
/// small step either side: the first-order error of one-sided steps cancels.
inline double central_pa_deg(double rc, double dc, double ru, double du, double rd, double dd) {
  const double p1 = eraPas(rc * kD2R, dc * kD2R, ru * kD2R, du * kD2R);
  const double p2 = eraPas(rc * kD2R, dc * kD2R, rd * kD2R, dd * kD2R) + 3.14159265358979323846;
  return eraAnp(std::atan2(std::sin(p1) + std::sin(p2), std::cos(p1) + std::cos(p2))) * kR2D;
}



}  // namespace skerry::iotest
