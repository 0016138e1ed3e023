// The WCSLIB adapter (see wcs.h for the conventions it implements).
//
// Sources:
//  - E. W. Greisen & M. R. Calabretta 2002, A&A 395, 1061 (FITS WCS Paper I):
//    pixel -> intermediate coordinates through CRPIX, PC/CD, CDELT.
//  - M. R. Calabretta & E. W. Greisen 2002, A&A 395, 1077 (Paper II): projections,
//    RADESYS/EQUINOX defaults (sect. 3.1), CROTA2 <-> PC (eq. 189).
//  - ERFA 2.0 (the open edition of IAU SOFA): eraFk5hip (FK5 -> Hipparcos/ICRS frame
//    rotation, F. Mignard & M. Froeschle 2000, A&A 354, 732), eraPmat76 (IAU 1976
//    precession, Lieske et al. 1977), rotation primitives eraRz/eraRy/eraRxr.
//  - Galactic: the IAU 1958 system's principal axes referred to FK5 J2000 by
//    C. A. Murray 1989, A&A 218, 325, then FK5 -> ICRS as for FK5 images (see
//    galactic_rotation below for why not ERFA's eraG2icrs).
#include "io/wcs.h"

#include <erfa.h>
#include <Eigen/LU>
#include <wcslib/wcs.h>
#include <wcslib/wcsfix.h>
#include <wcslib/wcshdr.h>
#include <wcslib/wcsmath.h>
#include <wcslib/wcsutil.h>

#include <algorithm>
#include <cctype>
#include <cmath>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <map>
#include <mutex>
#include <regex>
#include <stdexcept>
#include <vector>

#include "io/header_text.h"
#include "skerry/constants.h"
#include "skerry/gaussian.h"

namespace skerry {

namespace {

// wcspih touches global state in WCSLIB (its parser); parsing is serialised.
std::mutex g_parse_mutex;

using header_text::trim;
using header_text::upper;

struct WcsDeleter {
  void operator()(wcsprm* w) const {
    if (w) {
      wcsfree(w);
      delete w;
    }
  }
};
using WcsPtr = std::unique_ptr<wcsprm, WcsDeleter>;

WcsPtr new_blank_wcs() {
  WcsPtr w(new wcsprm);
  std::memset(w.get(), 0, sizeof(wcsprm));
  w->flag = -1;
  return w;
}

/// WCSLIB's reason for a failed call, from its static message table. WCSLIB's
/// detailed error records (wcserr_enable) are left disabled: version 7.12 loses
/// records on several paths (a record replaced without being freed, records on
/// distortion and tabular parts that wcsfree does not reach), which LeakSanitizer
/// found one path at a time under fuzzing; without them WCSLIB allocates nothing
/// for errors, and its status codes carry the reason.
std::string wcs_error_text(int status, const char* what) {
  std::string msg = what;
  if (status > 0 && status < 15) msg += std::string(": ") + wcs_errmsg[status];
  return msg;
}

enum class Frame { Icrs, Fk5, Galactic };

/// 3x3 row-major rotation applied to unit vectors: v_icrs = R v_native.
struct Rotation {
  double r[3][3];
};

// Unit vector of (lon, lat) in degrees.
inline void to_vec(double lon_deg, double lat_deg, double v[3]) {
  eraS2c(lon_deg * kDegToRad, lat_deg * kDegToRad, v);
}
inline void from_vec(const double v[3], double& lon_deg, double& lat_deg) {
  double a, d;
  eraC2s(const_cast<double*>(v), &a, &d);
  lon_deg = eraAnp(a) * kRadToDeg;
  lat_deg = d * kRadToDeg;
}

class WcslibSky final : public PixelSky {
 public:
  WcslibSky(WcsPtr proto, Frame frame, const Rotation& fk5_to_icrs)
      : proto_(std::move(proto)), frame_(frame), rot_(fk5_to_icrs) {
    lng_ = proto_->lng;
    lat_ = proto_->lat;
  }

  bool pix_to_sky(double x, double y, double& ra_deg, double& dec_deg) const override {
    pix_to_sky_n(1, &x, &y, &ra_deg, &dec_deg);
    return std::isfinite(ra_deg) && std::isfinite(dec_deg);
  }
  bool sky_to_pix(double ra_deg, double dec_deg, double& x, double& y) const override {
    sky_to_pix_n(1, &ra_deg, &dec_deg, &x, &y);
    return std::isfinite(x) && std::isfinite(y);
  }

  /// The same grid with the image frame's own longitude/latitude as (ra, dec).
  std::shared_ptr<const PixelSky> native_view() const {
    return std::make_shared<WcslibSky>(acquire(), Frame::Icrs, Rotation{});
  }

  /// 0-based pixels -> ICRS; NaN where undefined.
  void pix_to_sky_n(std::size_t n, const double* x, const double* y, double* ra,
                    double* dec) const {
    Lease lease(*this);
    if (n <= kSmall) {
      Scratch<kSmall> s;
      p2s_chunk(lease.get(), n, x, y, ra, dec, s);
      return;
    }
    auto s = std::make_unique<Scratch<kChunk>>();
    for (std::size_t i = 0; i < n; i += kChunk)
      p2s_chunk(lease.get(), std::min(kChunk, n - i), x + i, y + i, ra + i, dec + i, *s);
  }

  /// ICRS -> 0-based pixels; NaN where outside the projection.
  void sky_to_pix_n(std::size_t n, const double* ra, const double* dec, double* x,
                    double* y) const {
    Lease lease(*this);
    if (n <= kSmall) {
      Scratch<kSmall> s;
      s2p_chunk(lease.get(), n, ra, dec, x, y, s);
      return;
    }
    auto s = std::make_unique<Scratch<kChunk>>();
    for (std::size_t i = 0; i < n; i += kChunk)
      s2p_chunk(lease.get(), std::min(kChunk, n - i), ra + i, dec + i, x + i, y + i, *s);
  }

 private:
  static constexpr std::size_t kSmall = 8;
  static constexpr std::size_t kChunk = 2048;
  template <std::size_t N>
  struct Scratch {
    double pix[2 * N], img[2 * N], phi[N], theta[N], world[2 * N];
    int stat[N];
    bool bad[N];
  };

  template <std::size_t N>
  void p2s_chunk(wcsprm* w, std::size_t m, const double* x, const double* y, double* ra,
                 double* dec, Scratch<N>& s) const {
    for (std::size_t i = 0; i < m; ++i) {
      // The one place where 0-based pixels become FITS 1-based (Paper I: pixel
      // coordinate 1.0 is the centre of the first pixel).
      s.bad[i] = !(std::isfinite(x[i]) && std::isfinite(y[i]));
      s.pix[2 * i] = s.bad[i] ? 1.0 : x[i] + 1.0;
      s.pix[2 * i + 1] = s.bad[i] ? 1.0 : y[i] + 1.0;
    }
    const int status = wcsp2s(w, static_cast<int>(m), 2, s.pix, s.img, s.phi, s.theta, s.world, s.stat);
    for (std::size_t i = 0; i < m; ++i) {
      // WCSERR_BAD_PIX (8): some pixels invalid, flagged in stat[].
      const bool ok = !s.bad[i] && (status == 0 || (status == 8 && s.stat[i] == 0)) &&
                      std::isfinite(s.world[2 * i + lng_]) && std::isfinite(s.world[2 * i + lat_]);
      if (!ok) {
        ra[i] = dec[i] = std::numeric_limits<double>::quiet_NaN();
        continue;
      }
      native_to_icrs(s.world[2 * i + lng_], s.world[2 * i + lat_], ra[i], dec[i]);
    }
  }

  template <std::size_t N>
  void s2p_chunk(wcsprm* w, std::size_t m, const double* ra, const double* dec, double* x,
                 double* y, Scratch<N>& s) const {
    for (std::size_t i = 0; i < m; ++i) {
      s.bad[i] = !(std::isfinite(ra[i]) && std::isfinite(dec[i]) && std::abs(dec[i]) <= 90.0);
      double lon = 0.0, lat = 0.0;
      if (!s.bad[i]) icrs_to_native(ra[i], dec[i], lon, lat);
      s.world[2 * i + lng_] = lon;
      s.world[2 * i + lat_] = lat;
    }
    const int status = wcss2p(w, static_cast<int>(m), 2, s.world, s.phi, s.theta, s.img, s.pix, s.stat);
    for (std::size_t i = 0; i < m; ++i) {
      // WCSERR_BAD_WORLD (9): some positions invalid, flagged in stat[].
      const bool ok = !s.bad[i] && (status == 0 || (status == 9 && s.stat[i] == 0)) &&
                      std::isfinite(s.pix[2 * i]) && std::isfinite(s.pix[2 * i + 1]);
      if (!ok) {
        x[i] = y[i] = std::numeric_limits<double>::quiet_NaN();
        continue;
      }
      x[i] = s.pix[2 * i] - 1.0;  // FITS 1-based -> 0-based
      y[i] = s.pix[2 * i + 1] - 1.0;
    }
  }

  // WCSLIB's wcsp2s/wcss2p write scratch state into the wcsprm (and may call
  // wcsset), so each call leases a private copy from a pool; copies are made on
  // demand (one per concurrently converting thread) and reused.
  class Lease {
   public:
    explicit Lease(const WcslibSky& s) : sky_(s), w_(s.acquire()) {}
    ~Lease() { sky_.release(std::move(w_)); }
    Lease(const Lease&) = delete;
    Lease& operator=(const Lease&) = delete;
    wcsprm* get() { return w_.get(); }

   private:
    const WcslibSky& sky_;
    WcsPtr w_;
  };

  WcsPtr acquire() const {
    std::lock_guard<std::mutex> lock(mutex_);
    if (!pool_.empty()) {
      WcsPtr w = std::move(pool_.back());
      pool_.pop_back();
      return w;
    }
    WcsPtr w = new_blank_wcs();
    if (wcssub(1, proto_.get(), nullptr, nullptr, w.get()) != 0 || wcsset(w.get()) != 0)
      throw std::runtime_error("WCSLIB could not copy a world coordinate system");
    return w;
  }
  void release(WcsPtr w) const {
    std::lock_guard<std::mutex> lock(mutex_);
    pool_.push_back(std::move(w));
  }

  void native_to_icrs(double lon, double lat, double& ra, double& dec) const {
    switch (frame_) {
      case Frame::Icrs:
        ra = lon;
        dec = lat;
        break;
      case Frame::Galactic:
      case Frame::Fk5: {
        double v[3], u[3];
        to_vec(lon, lat, v);
        for (int i = 0; i < 3; ++i)
          u[i] = rot_.r[i][0] * v[0] + rot_.r[i][1] * v[1] + rot_.r[i][2] * v[2];
        from_vec(u, ra, dec);
        break;
      }
    }
  }
  void icrs_to_native(double ra, double dec, double& lon, double& lat) const {
    switch (frame_) {
      case Frame::Icrs:
        lon = ra;
        lat = dec;
        break;
      case Frame::Galactic:
      case Frame::Fk5: {
        double v[3], u[3];
        to_vec(ra, dec, v);
        for (int i = 0; i < 3; ++i)  // transpose of the rotation
          u[i] = rot_.r[0][i] * v[0] + rot_.r[1][i] * v[1] + rot_.r[2][i] * v[2];
        from_vec(u, lon, lat);
        break;
      }
    }
  }

  WcsPtr proto_;
  Frame frame_;
  Rotation rot_;
  int lng_ = 0, lat_ = 1;
  mutable std::mutex mutex_;
  mutable std::vector<WcsPtr> pool_;
};

/// FK5 mean equator and equinox `equinox_jyr` (Julian epoch) -> ICRS.
///   v_J2000 = P^T v_E with P = eraPmat76(J2000 -> E) (IAU 1976 precession, the
///   precession of the FK5 system); v_ICRS = R5h v_J2000 with R5h from eraFk5hip
///   (orientation of FK5 J2000 relative to Hipparcos/ICRS; frame spin ignored,
///   positions at epoch J2000 as ERFA eraFk52h does for zero proper motion).
Rotation fk5_rotation(double equinox_jyr) {
  double r5h[3][3], s5h[3];
  eraFk5hip(r5h, s5h);
  Rotation out{};
  if (std::abs(equinox_jyr - 2000.0) < 1e-9) {
    std::memcpy(out.r, r5h, sizeof(r5h));
    return out;
  }
  double d1, d2, p[3][3];
  eraEpj2jd(equinox_jyr, &d1, &d2);
  eraPmat76(d1, d2, p);
  double pt[3][3];
  eraTr(p, pt);
  eraRxr(r5h, pt, out.r);
  return out;
}

/// Galactic (l, b) -> ICRS as one rotation, v_ICRS = R5h G^T v_gal, where
///   G = Rz(180 deg - theta) Ry(90 deg - delta_P) Rz(alpha_P)   (FK5 J2000 -> Galactic)
/// with the north Galactic pole (alpha_P, delta_P) = (192.8594812065348,
/// 27.12825118085622) deg and the Galactic longitude of the north celestial pole
/// theta = 122.9319185680026 deg, FK5 J2000 (Murray 1989, A&A 218, 325: 12h51m26.2755s,
/// +27d07m41.704s, 122.93191857 deg; digits from memory, as astropy's Galactic frame
/// uses them), and R5h the FK5 -> ICRS rotation of eraFk5hip (as for FK5 images).
/// ERFA's eraG2icrs instead takes the same pole numbers as ICRS (Hipparcos
/// Catalogue, ESA 1997, vol. 1 sect. 1.5.3); the two readings differ by ~25 mas.
/// This one is used because the independently rendered golden images follow it
/// (tests/io/golden_test.cpp checks them to 1e-3 pixel = 2 mas; eraG2icrs misses
/// by ~0.012 pixel there) and because it converts FK5-based axes one way only.
Rotation galactic_rotation() {
  const double alpha_p = 192.8594812065348 * kDegToRad;
  const double delta_p = 27.12825118085622 * kDegToRad;
  const double theta = 122.9319185680026 * kDegToRad;
  double g[3][3];
  eraIr(g);
  eraRz(alpha_p, g);
  eraRy(kPi / 2.0 - delta_p, g);
  eraRz(kPi - theta, g);
  double gt[3][3], r5h[3][3], s5h[3];
  eraTr(g, gt);
  eraFk5hip(r5h, s5h);
  Rotation out{};
  eraRxr(r5h, gt, out.r);
  return out;
}

/// Keywords whose values skerry reads from an image header: the WCS families of
/// FITS WCS Papers I-II (REF-FITS-04), the frame, the unit and the beam.
bool keyword_read_by_skerry(const std::string& key) {
  static const std::regex families(
      "(CTYPE|CUNIT|CRVAL|CRPIX|CDELT|CROTA)[0-9]+[A-Z]?|(CD|PC|PV|PS)[0-9]+_[0-9]+[A-Z]?|"
      "(LONPOLE|LATPOLE|EQUINOX|RADESYS|WCSAXES)[A-Z]?|EPOCH|RADECSYS|BUNIT|BMAJ|BMIN|BPA|RESTFRQ|RESTFREQ|NAXIS[0-9]*");
  return std::regex_match(key, families);
}

/// Keywords whose value must be a finite number (the numeric WCS keywords).
bool keyword_is_wcs_number(const std::string& key) {
  static const std::regex numbers("(CRVAL|CRPIX|CDELT|CROTA)[0-9]+[A-Z]?|(CD|PC)[0-9]+_[0-9]+[A-Z]?|"
                                  "(LONPOLE|LATPOLE)[A-Z]?");
  return std::regex_match(key, numbers);
}

/// The value field of a "KEYWORD= value / comment" card, trimmed (a string value
/// keeps its quotes; a '/' inside quotes is part of the string).
std::string card_value(std::string_view card) {
  std::string_view v = card.substr(10);
  std::size_t end = v.size();
  bool in_string = false;
  for (std::size_t i = 0; i < v.size(); ++i) {
    if (v[i] == '\'') in_string = !in_string;
    else if (v[i] == '/' && !in_string) {
      end = i;
      break;
    }
  }
  return trim(std::string(v.substr(0, end)));
}

/// A FITS integer or real value (REF-FITS-02): digits with an optional sign,
/// decimal point and exponent introduced by E or D; NaN and Inf are not FITS
/// numbers.
bool is_finite_fits_number(std::string v) {
  for (char& c : v)
    if (c == 'D' || c == 'd') c = 'E';
  if (v.empty() || std::any_of(v.begin(), v.end(), [](char c) {
        return !(std::isdigit(static_cast<unsigned char>(c)) || c == '+' || c == '-' || c == '.' || c == 'E' || c == 'e');
      }))
    return false;
  char* end = nullptr;
  const double x = std::strtod(v.c_str(), &end);
  return end == v.c_str() + v.size() && std::isfinite(x);
}

/// Keywords of the optical-plate distortions that WCSLIB translates on its own
/// (wcspih, WCSLIB 7.12): SIP polynomials (A_p_q, B_p_q, AP_p_q, BP_p_q), the DSS
/// plate solution (CNPIXn, PPO3/6, X/YPIXELSZ, PLTRA*, PLTDEC*, AMDXn, AMDYn) and
/// IRAF's WATi_nnn. Radio images carry none. A DSS card replaces the header's own
/// CRVAL/CTYPE with the plate solution, silently; and a SIP or DSS card whose value
/// does not parse makes wcspih write through a null pointer (found by
/// fuzz_fits_image). Such a header is therefore refused before it reaches WCSLIB.
/// Returns what the keyword is, or nullptr.
const char* translated_distortion(const std::string& key) {
  static const std::regex sip("(A|B|AP|BP)_[0-9]+_[0-9]+");
  static const std::regex dss("CNPIX[12]|PPO[36]|[XY]PIXELSZ|PLTRA[HMS]|PLTDEC(SN|[DMS])|AMD[XY][0-9]+");
  static const std::regex wat("WAT[12]_[0-9]+");
  if (std::regex_match(key, sip)) return "a SIP distortion";
  if (std::regex_match(key, dss)) return "a DSS plate-solution";
  if (std::regex_match(key, wat)) return "an IRAF WAT distortion";
  return nullptr;
}

}  // namespace

std::shared_ptr<const PixelSky> wcs_from_header(const std::string& header_cards,
                                                std::string* frame_out,
                                                std::string* cards2d_out) {
  if (header_cards.empty() || header_cards.size() % 80 != 0)
    throw std::invalid_argument("header text is not a sequence of 80-character cards");
  // FITS Standard 4.0 sec. 4.1.1-4.1.2.1: a header holds only printable ASCII
  // (0x20-0x7E), and a keyword only A-Z, 0-9, '-', '_' followed by blanks (lower
  // case is tolerated, as some writers produce it). WCSLIB 7.12's header parser
  // overflows a heap block on some cards that break this (found by fuzzing: a
  // non-ASCII byte in place of an axis number), so such a header is refused here,
  // before it reaches wcspih. Commentary cards (COMMENT, HISTORY, blank keyword)
  // carry no WCS; bytes outside printable ASCII in their text are blanked in the
  // copy given to WCSLIB rather than refused.
  std::vector<char> text(header_cards.begin(), header_cards.end());
  for (std::size_t c = 0; c < header_cards.size(); c += 80) {
    const std::string_view card(header_cards.data() + c, 80);
    const std::size_t n = c / 80 + 1;
    bool blank_seen = false;
    for (std::size_t i = 0; i < 8; ++i) {
      const char ch = card[i];
      const bool ok = (ch >= 'A' && ch <= 'Z') || (ch >= 'a' && ch <= 'z') || (ch >= '0' && ch <= '9') ||
                      ch == '-' || ch == '_';
      if (ch == ' ') {
        blank_seen = true;
      } else if (!ok || blank_seen) {
        throw std::invalid_argument("header card " + std::to_string(n) +
                                    " has an invalid keyword (FITS Standard 4.0 sec. 4.1.2.1)");
      }
    }
    const std::string_view key = card.substr(0, 8);
    const bool commentary = key == "COMMENT " || key == "HISTORY " || key == "        ";
    if (const char* kind = translated_distortion(upper(trim(std::string(key)))))
      throw std::invalid_argument(
          "header card " + std::to_string(n) + " (" + trim(std::string(key)) + ") is " + kind +
          " keyword: skerry reads the linear celestial WCS of the FITS WCS papers (Greisen & Calabretta 2002) and does not "
          "apply optical-plate distortions; remove the plate-solution cards or reproject the image");
    for (std::size_t i = 8; i < 80; ++i) {
      const auto ch = static_cast<unsigned char>(card[i]);
      if (ch >= 0x20 && ch <= 0x7E) continue;
      if (!commentary)
        throw std::invalid_argument("header card " + std::to_string(n) + " (" + std::string(key) +
                                    ") holds a byte that is not printable ASCII (FITS Standard 4.0 sec. 4.1.1)");
      text[c + i] = ' ';
    }
    // FITS Standard 4.0 sec. 4.2.1.1: a string value is enclosed in single quotes
    // (a quote inside it doubled). WCSLIB 7.12's parser overruns a buffer on a
    // string without its closing quote (found by fuzz_fits_image), so such a
    // card is refused here as well.
    if (!commentary && card.substr(8, 2) == "= ") {
      std::size_t i = 10;
      while (i < 80 && card[i] == ' ') ++i;
      if (i < 80 && card[i] == '\'') {
        bool closed = false;
        for (++i; i < 80; ++i) {
          if (card[i] != '\'') continue;
          if (i + 1 < 80 && card[i + 1] == '\'') {
            ++i;  // doubled quote inside the string
            continue;
          }
          closed = true;
          break;
        }
        if (!closed)
          throw std::invalid_argument("header card " + std::to_string(n) + " (" + std::string(key) +
                                      ") has a string value without its closing quote (FITS Standard 4.0 sec. 4.2.1.1)");
      }
    }
  }
  // Values skerry reads must be unambiguous and, for the numeric WCS keywords,
  // numbers: a keyword repeated with another value (the FITS Standard allows a
  // non-commentary keyword once per header, REF-FITS-02; readers disagree on
  // which copy wins) and a WCS value that is not a finite number
  // (WCSLIB skips such a card and the default 0 would be used) are refused, the
  // card named. Repeats of keywords skerry does not read are left alone.
  std::map<std::string, std::pair<std::size_t, std::string>> seen;
  for (std::size_t c = 0; c < header_cards.size(); c += 80) {
    const std::string_view card(header_cards.data() + c, 80);
    if (card.substr(8, 2) != "= ") continue;
    const std::string key = upper(trim(std::string(card.substr(0, 8))));
    if (!keyword_read_by_skerry(key)) continue;
    const std::size_t n = c / 80 + 1;
    const std::string value = card_value(card);
    if (keyword_is_wcs_number(key) && !is_finite_fits_number(value))
      throw std::invalid_argument("header card " + std::to_string(n) + " (" + key + " = " + value +
                                  ") is not a finite number");
    const auto [it, fresh] = seen.emplace(key, std::make_pair(n, value));
    if (!fresh && it->second.second != value)
      throw std::invalid_argument("keyword " + key + " appears twice with different values (card " +
                                  std::to_string(it->second.first) + ": " + it->second.second + ", card " +
                                  std::to_string(n) + ": " + value + "); a keyword may appear once per header");
  }
  text.push_back('\0');
  const int nkeyrec = static_cast<int>(header_cards.size() / 80);

  WcsPtr sub = new_blank_wcs();
  {
    std::lock_guard<std::mutex> lock(g_parse_mutex);
    int nreject = 0, nwcs = 0;
    wcsprm* all = nullptr;
    // WCSHDR_all: accept the common non-standard forms too (CROTAn, EPOCH,
    // RADECSYS, VSOURCE, ...); ctrl = 0: rejected cards are not reported.
    int status = wcspih(text.data(), nkeyrec, WCSHDR_all, 0, &nreject, &nwcs, &all);
    if (status == 0 && (nwcs < 1 || all == nullptr)) {
      if (all) wcsvfree(&nwcs, &all);
      throw std::invalid_argument("no celestial WCS (no WCS keywords in the header)");
    }
    if (status != 0 || nwcs < 1 || all == nullptr) {
      if (all) wcsvfree(&nwcs, &all);
      throw std::invalid_argument(std::string("WCSLIB could not parse the header") +
                                  (status > 0 && status < 7
                                       ? std::string(": ") + wcshdr_errmsg[status]
                                       : std::string()));
    }
    // The primary description (alternate ' ') is the first one wcspih returns.
    wcsprm* primary = &all[0];
    for (int i = 0; i < nwcs; ++i)
      if (all[i].alt[0] == ' ' || all[i].alt[0] == '\0') {
        primary = &all[i];
        break;
      }
    if (primary->naxis < 2) {
      wcsvfree(&nwcs, &all);
      throw std::invalid_argument("no celestial WCS (fewer than 2 world axes)");
    }
    // Keep image axes 1 and 2, in that order, so that pixel (x, y) feeds them.
    int nsub = 2;
    int axes[2] = {1, 2};
    status = wcssub(1, primary, &nsub, axes, sub.get());
    const std::string ct1 = trim(std::string(primary->ctype[0], strnlen(primary->ctype[0], 72)));
    const std::string ct2 = trim(std::string(primary->ctype[1], strnlen(primary->ctype[1], 72)));
    wcsvfree(&nwcs, &all);
    if (status != 0) throw std::invalid_argument("WCSLIB could not select the celestial axes 1 and 2");

    // Translate AIPS-style NCP/GLS and unit spellings (WCSLIB's celfix, unitfix).
    // celfix runs wcsset itself, so only where there is something to translate.
    auto ends_with = [](const std::string& a, const char* b) {
      const std::size_t n = std::strlen(b);
      return a.size() >= n && a.compare(a.size() - n, n, b) == 0;
    };
    // Only when both axes carry the code: with different codes (e.g. RA---SIN with
    // DEC--GLS) wcsset below reports the inconsistent axes.
    if ((ends_with(ct1, "NCP") && ends_with(ct2, "NCP")) || (ends_with(ct1, "GLS") && ends_with(ct2, "GLS")))
      celfix(sub.get());
    unitfix(0, sub.get());
    status = wcsset(sub.get());
    if (status != 0)
      throw std::invalid_argument(wcs_error_text(status, "invalid celestial WCS"));
    if (sub->lng < 0 || sub->lat < 0 || sub->cubeface >= 0)
      throw std::invalid_argument("no celestial WCS on axes 1 and 2 (CTYPE1 = '" + ct1 +
                                  "', CTYPE2 = '" + ct2 + "')");
  }

  const std::string lngtyp = trim(sub->lngtyp);
  std::string radesys = upper(trim(sub->radesys));
  Frame frame = Frame::Icrs;
  Rotation rot{};
  std::string frame_name;
  if (lngtyp == "RA") {
    const bool has_equinox = !undefined(sub->equinox);
    if (radesys.empty()) {
      // Paper II sect. 3.1: ICRS when there is no EQUINOX, FK4 for EQUINOX < 1984,
      // FK5 otherwise.
      if (!has_equinox)
        radesys = "ICRS";
      else
        radesys = sub->equinox < 1984.0 ? "FK4" : "FK5";
    }
    if (radesys == "ICRS") {
      frame = Frame::Icrs;
      frame_name = "ICRS";
    } else if (radesys == "FK5") {
      frame = Frame::Fk5;
      frame_name = "FK5";
      rot = fk5_rotation(has_equinox ? sub->equinox : 2000.0);
    } else if (radesys == "FK4" || radesys == "FK4-NO-E") {
      throw std::invalid_argument(
          "celestial frame " + radesys +
          (has_equinox ? " (EQUINOX " + fits_real(sub->equinox) + ")" : std::string()) +
          " is not supported: convert the image to ICRS or FK5 J2000 first");
    } else {
      throw std::invalid_argument("celestial frame RADESYS = '" + radesys +
                                  "' is not supported (ICRS, FK5 or Galactic)");
    }
  } else if (lngtyp == "GLON") {
    frame = Frame::Galactic;
    frame_name = "GALACTIC";
    rot = galactic_rotation();
  } else {
    throw std::invalid_argument("celestial axes " + lngtyp + "/" + trim(sub->lattyp) +
                                " are not supported (RA/DEC or GLON/GLAT)");
  }

  if (cards2d_out) {
    int nkey = 0;
    char* hdr = nullptr;
    const int status = wcshdo(WCSHDO_P17, sub.get(), &nkey, &hdr);
    if (status != 0 || hdr == nullptr) {
      if (hdr) wcsdealloc(hdr);
      throw std::invalid_argument(wcs_error_text(status, "WCSLIB could not write the WCS"));
    }
    std::string cards(hdr, static_cast<std::size_t>(nkey) * 80);
    wcsdealloc(hdr);
    // wcshdo writes comment cards and blank padding too; keep keyword cards only.
    std::string kept;
    for (std::size_t i = 0; i + 80 <= cards.size(); i += 80) {
      const std::string c = cards.substr(i, 80);
      if (c.compare(0, 8, "COMMENT ") == 0 || c.compare(0, 8, "        ") == 0) continue;
      kept += c;
    }
    *cards2d_out = kept;
  }
  if (frame_out) *frame_out = frame_name;
  return std::make_shared<WcslibSky>(std::move(sub), frame, rot);
}

std::shared_ptr<const PixelSky> native_frame_sky(const PixelSky& sky) {
  const auto* w = dynamic_cast<const WcslibSky*>(&sky);
  if (!w) return nullptr;
  return w->native_view();
}

SkyBeam::SkyBeam(std::shared_ptr<const PixelSky> wcs, const std::string& frame, const Beam& beam,
                 bool pa_in_image_frame)
    : wcs_(std::move(wcs)), beam_(beam) {
  if (pa_in_image_frame && frame == "GALACTIC" && wcs_) native_ = native_frame_sky(*wcs_);
}

std::optional<Beam> SkyBeam::at(double x, double y) const {
  if (!native_) return beam_;
  const auto ln = local_geometry(*native_, x, y);
  const auto li = local_geometry(*wcs_, x, y);
  if (!ln || !li) return std::nullopt;
  const Eigen::Vector2d north_pix = ln->jac_arcsec_per_pix.inverse() * Eigen::Vector2d(0.0, 1.0);
  Beam b = beam_;
  b.pa_deg = wrap_pa_180(b.pa_deg + li->pa_of_pixel_direction_deg(north_pix(0), north_pix(1)));
  return b;
}

void pix_to_sky_many(const PixelSky& sky, std::size_t n, const double* x, const double* y,
                     double* ra_deg, double* dec_deg) {
  if (auto* w = dynamic_cast<const WcslibSky*>(&sky)) {
    w->pix_to_sky_n(n, x, y, ra_deg, dec_deg);
    return;
  }
  for (std::size_t i = 0; i < n; ++i)
    if (!sky.pix_to_sky(x[i], y[i], ra_deg[i], dec_deg[i]))
      ra_deg[i] = dec_deg[i] = std::numeric_limits<double>::quiet_NaN();
}

void sky_to_pix_many(const PixelSky& sky, std::size_t n, const double* ra_deg,
                     const double* dec_deg, double* x, double* y) {
  if (auto* w = dynamic_cast<const WcslibSky*>(&sky)) {
    w->sky_to_pix_n(n, ra_deg, dec_deg, x, y);
    return;
  }
  for (std::size_t i = 0; i < n; ++i)
    if (!sky.sky_to_pix(ra_deg[i], dec_deg[i], x[i], y[i]))
      x[i] = y[i] = std::numeric_limits<double>::quiet_NaN();
}

// ---- Header writing -------------------------------------------------------------

std::string fits_real(double v) {
  if (!std::isfinite(v)) throw std::invalid_argument("a FITS real value must be finite");
  char buf[40];
  for (int prec = 15; prec <= 17; ++prec) {
    std::snprintf(buf, sizeof buf, "%.*G", prec, v);
    if (std::strtod(buf, nullptr) == v) break;
  }
  std::string s(buf);
  // FITS reals carry a decimal point (FITS Standard 4.0, sect. 4.2.4).
  if (s.find('.') == std::string::npos) {
    const std::size_t e = s.find('E');
    if (e == std::string::npos)
      s += ".0";
    else
      s.insert(e, ".0");
  }
  return s;
}

std::string fits_string(const std::string& s) {
  std::string out = "'";
  for (char c : s) {
    out += c;
    if (c == '\'') out += '\'';
  }
  // Fixed-format strings are at least 8 characters between the quotes.
  while (out.size() < 9) out += ' ';
  return out + "'";
}

std::string fits_card(const std::string& key, const std::string& value,
                      const std::string& comment) {
  if (key.empty() || key.size() > 8)
    throw std::invalid_argument("FITS keyword '" + key + "' must have 1 to 8 characters");
  for (char c : key)
    if (!(std::isupper(static_cast<unsigned char>(c)) || std::isdigit(static_cast<unsigned char>(c)) ||
          c == '-' || c == '_'))
      throw std::invalid_argument("FITS keyword '" + key + "' has a character other than A-Z 0-9 - _");
  std::string card = key;
  card.resize(8, ' ');
  card += "= ";
  if (!value.empty() && value[0] == '\'') {
    card += value;
  } else {
    // Fixed format: numbers and logicals right-justified to column 30.
    if (value.size() < 20) card += std::string(20 - value.size(), ' ');
    card += value;
  }
  if (!comment.empty() && card.size() + 3 < 80) card += " / " + comment;
  if (card.size() > 80) {
    if (value.size() + 10 > 80) throw std::invalid_argument("FITS value of " + key + " is too long");
    card.resize(80);
  }
  card.resize(80, ' ');
  return card;
}

std::string header_for_grid(const GridSpec& g) {
  if (g.nx < 1 || g.ny < 1) throw std::invalid_argument("grid has no pixels");
  if (!(g.cdelt1_deg != 0.0 && g.cdelt2_deg != 0.0 && std::isfinite(g.cdelt1_deg) &&
        std::isfinite(g.cdelt2_deg)))
    throw std::invalid_argument("grid pixel steps must be finite and non-zero");
  std::string code = upper(g.projection);
  if (code.size() != 3 || !std::all_of(code.begin(), code.end(), [](char c) { return c >= 'A' && c <= 'Z'; }))
    throw std::invalid_argument("projection code '" + g.projection + "' is not 3 letters");
  const std::string frame = upper(g.frame);
  std::string c1, c2;
  if (frame == "ICRS" || frame == "FK5") {
    c1 = "RA---" + code;
    c2 = "DEC--" + code;
  } else if (frame == "GALACTIC") {
    c1 = "GLON-" + code;
    c2 = "GLAT-" + code;
  } else {
    throw std::invalid_argument("grid frame '" + g.frame + "' is not ICRS, FK5 or GALACTIC");
  }
  std::string h;
  h += fits_card("NAXIS", "2");
  h += fits_card("NAXIS1", std::to_string(g.nx));
  h += fits_card("NAXIS2", std::to_string(g.ny));
  h += fits_card("CTYPE1", fits_string(c1));
  h += fits_card("CTYPE2", fits_string(c2));
  h += fits_card("CRVAL1", fits_real(g.crval1_deg), "[deg]");
  h += fits_card("CRVAL2", fits_real(g.crval2_deg), "[deg]");
  h += fits_card("CRPIX1", fits_real(g.crpix1), "reference pixel (1-based)");
  h += fits_card("CRPIX2", fits_real(g.crpix2), "reference pixel (1-based)");
  h += fits_card("CDELT1", fits_real(g.cdelt1_deg), "[deg]");
  h += fits_card("CDELT2", fits_real(g.cdelt2_deg), "[deg]");
  if (g.rotation_deg != 0.0) {
    // CROTA2 = rho as a PC matrix (Calabretta & Greisen 2002, eq. 189):
    //   PC1_1 = cos rho, PC1_2 = -(CDELT2/CDELT1) sin rho,
    //   PC2_1 = (CDELT1/CDELT2) sin rho, PC2_2 = cos rho.
    const double r = g.rotation_deg * kDegToRad;
    const double ratio = g.cdelt2_deg / g.cdelt1_deg;
    h += fits_card("PC1_1", fits_real(std::cos(r)));
    h += fits_card("PC1_2", fits_real(-ratio * std::sin(r)));
    h += fits_card("PC2_1", fits_real(std::sin(r) / ratio));
    h += fits_card("PC2_2", fits_real(std::cos(r)));
  }
  for (const auto& [m, v] : g.pv2) {
    if (m < 0 || m > 99) throw std::invalid_argument("PV2_m index out of 0..99");
    h += fits_card("PV2_" + std::to_string(m), fits_real(v));
  }
  h += fits_card("CUNIT1", fits_string("deg"));
  h += fits_card("CUNIT2", fits_string("deg"));
  if (frame == "ICRS") {
    h += fits_card("RADESYS", fits_string("ICRS"));
  } else if (frame == "FK5") {
    h += fits_card("RADESYS", fits_string("FK5"));
    h += fits_card("EQUINOX", fits_real(2000.0));
  }
  if (g.beam.valid()) {
    h += fits_card("BMAJ", fits_real(g.beam.maj_arcsec * kArcsecToDeg), "beam major FWHM [deg]");
    h += fits_card("BMIN", fits_real(g.beam.min_arcsec * kArcsecToDeg), "beam minor FWHM [deg]");
    h += fits_card("BPA", fits_real(g.beam.pa_deg), "beam PA east of north [deg]");
  }
  if (g.freq_hz > 0.0 && std::isfinite(g.freq_hz))
    h += fits_card("FREQ", fits_real(g.freq_hz), "observing frequency [Hz]");
  return h;
}

}  // namespace skerry
