// FITS images in and out through CFITSIO (see fits_image.h for the decisions).
//
// Sources: FITS Standard 4.0 (IAU FITS Working Group 2016; Pence et al. 2010,
// A&A 524, A42 for 3.0): BITPIX, NAXISn, BSCALE/BZERO (physical = BZERO + BSCALE x
// stored), BLANK for integer data and NaN for floating data (REF-FITS-02), data
// padded to 2880-byte blocks. Beam keywords BMAJ/BMIN/BPA in degrees (common
// practice, REF-FITS-03). Tiled image compression: Pence et al. 2009 (FITS tiled
// image convention), handled by CFITSIO.
#include "io/fits_image.h"

#include <fcntl.h>
#include <fitsio.h>
#include <sys/stat.h>
#include <unistd.h>

#include <algorithm>
#include <cctype>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <cstdlib>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <limits>
#include <memory>
#include <mutex>
#include <optional>
#include <stdexcept>
#include <string_view>
#include <utility>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/header_text.h"
#include "io/wcs.h"
#include "skerry/constants.h"

namespace skerry {

namespace fs = std::filesystem;

void initialise_cfitsio() {
  static std::once_flag once;
  std::call_once(once, [] { fits_init_cfitsio(); });
}

void check_fits_header_text(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return;  // the reader reports it
  std::error_code ec;
  const std::uint64_t size = fs::file_size(path, ec);
  if (ec) return;
  char head[2] = {0, 0};
  in.read(head, 2);
  if (in.gcount() == 2 && static_cast<unsigned char>(head[0]) == 0x1f && static_cast<unsigned char>(head[1]) == 0x8b)
    return;  // gzip: CFITSIO decompresses it
  auto int_value = [](std::string_view card, long long& out) {
    std::string_view v = card.substr(10);  // the value: column 11 up to a comment
    if (const auto slash = v.find('/'); slash != std::string_view::npos) v = v.substr(0, slash);
    while (!v.empty() && v.front() == ' ') v.remove_prefix(1);
    while (!v.empty() && v.back() == ' ') v.remove_suffix(1);
    if (!v.empty() && v.front() == '+') v.remove_prefix(1);
    const auto r = std::from_chars(v.data(), v.data() + v.size(), out);
    return !v.empty() && r.ec == std::errc() && r.ptr == v.data() + v.size();
  };
  std::uint64_t offset = 0;
  std::vector<char> block(2880);
  for (int hdu = 1; hdu <= 10000 && offset < size; ++hdu) {
    long long bitpix = 0, naxis = -1, pcount = 0, gcount = 1;
    std::vector<long long> naxes;
    bool groups = false, end = false;
    std::string unreadable;  // the first structural card whose value is not a valid integer
    for (std::uint64_t card_no = 0; !end;) {
      in.seekg(static_cast<std::streamoff>(offset));
      in.read(block.data(), 2880);
      if (in.gcount() != 2880) {
        // A header is a whole number of 2880-byte blocks ending in END (FITS Standard
        // 4.0 sec. 3.3.1). Past the first HDU, CFITSIO reports it for the HDU read.
        if (hdu == 1)
          throw InputError(path, "is truncated: the file (" + std::to_string(size) +
                                     " bytes) ends inside the primary header, before its END card"
                                     " (FITS Standard 4.0 sec. 3.3.1: whole 2880-byte header blocks)");
        return;
      }
      offset += 2880;
      for (int c = 0; c < 36; ++c) {
        const std::string_view card(block.data() + 80 * c, 80);
        ++card_no;
        const std::string_view key = card.substr(0, 8);
        if (key == "END     ") {
          end = true;
          break;
        }
        if (key == "COMMENT " || key == "HISTORY " || key == "        ") continue;
        auto where = [&] {
          std::string k(key);
          for (char& ch : k)
            if (static_cast<unsigned char>(ch) < 0x20 || static_cast<unsigned char>(ch) > 0x7E) ch = '?';
          while (!k.empty() && k.back() == ' ') k.pop_back();
          return "HDU " + std::to_string(hdu) + ", header card " + std::to_string(card_no) + " (" + k + ")";
        };
        for (char ch : card)
          if (static_cast<unsigned char>(ch) < 0x20 || static_cast<unsigned char>(ch) > 0x7E)
            throw InputError(path, where() + " holds a byte that is not printable ASCII (FITS Standard 4.0 sec. 4.1.2.1)");
        // A keyword is A-Z, 0-9, '-' and '_', left-justified and padded with
        // blanks (sec. 4.1.2.1; lower case tolerated, as some writers produce it).
        // CFITSIO 4.2 overflows a buffer on a table keyword holding '=' (found
        // by fuzz_fits_table), so such a card is refused before CFITSIO opens
        // the file.
        for (std::size_t i = 0, blank = 0; i < 8; ++i) {
          const char ch = key[i];
          const bool ok = std::isalnum(static_cast<unsigned char>(ch)) || ch == '-' || ch == '_';
          if (ch == ' ') blank = 1;
          else if (!ok || blank)
            throw InputError(path, where() + " has an invalid keyword (FITS Standard 4.0 sec. 4.1.2.1)");
        }
        if (card.substr(8, 2) == "= ") {
          std::size_t i = 10;
          while (i < 80 && card[i] == ' ') ++i;
          if (i < 80 && card[i] == '\'') {
            bool closed = false;
            for (++i; i < 80 && !closed; ++i) {
              if (card[i] != '\'') continue;
              if (i + 1 < 80 && card[i + 1] == '\'')
                ++i;  // a doubled quote inside the string
              else
                closed = true;
            }
            if (!closed)
              throw InputError(path, where() + " has a string value without its closing quote (FITS Standard 4.0 sec. 4.2.1.1)");
          }
        }
        long long v = 0;
        if (key == "BITPIX  ") {
          if (!(int_value(card, bitpix)) && unreadable.empty()) unreadable = where();
        } else if (key == "NAXIS   ") {
          if (!(int_value(card, naxis) && naxis >= 0 && naxis <= 999) && unreadable.empty()) unreadable = where();
        } else if (key.substr(0, 5) == "NAXIS") {
          if (!(int_value(card, v) && v >= 0) && unreadable.empty()) unreadable = where();
          naxes.push_back(v);
        } else if (key == "PCOUNT  ") {
          if (!(int_value(card, pcount) && pcount >= 0) && unreadable.empty()) unreadable = where();
        } else if (key == "GCOUNT  ") {
          if (!(int_value(card, gcount) && gcount >= 0) && unreadable.empty()) unreadable = where();
        } else if (key == "GROUPS  ") {
          groups = card.substr(10, 20).find('T') != std::string_view::npos;
        }
      }
    }
    // Data size, FITS Standard 4.0 eq. 2: |BITPIX| x GCOUNT x (PCOUNT + NAXIS1 x
    // ... x NAXISm) bits, NAXIS1 left out of the product for random groups.
    // Mandatory structural keywords are integers (FITS Standard 4.0 sec. 4.4.1).
    // A header whose structure cannot be read is refused here: CFITSIO would go on
    // to parse what follows it (fuzzing found a CFITSIO buffer overflow in a
    // binary-table header reached past an unreadable NAXIS).
    if (!unreadable.empty())
      throw InputError(path, unreadable + " has no valid non-negative integer value (FITS Standard 4.0 sec. 4.4.1)");
    if (naxis < 0 || bitpix == 0 || static_cast<long long>(naxes.size()) != naxis)
      throw InputError(path, "HDU " + std::to_string(hdu) +
                                 " lacks BITPIX, NAXIS or one of its NAXISn cards (FITS Standard 4.0 sec. 4.4.1)");
    long double bits = 0;
    if (naxis > 0) {
      long double prod = 1;
      for (long long k = (groups && naxes[0] == 0) ? 1 : 0; k < naxis; ++k) prod *= static_cast<long double>(naxes[static_cast<std::size_t>(k)]);
      bits = std::fabs(static_cast<long double>(bitpix)) * static_cast<long double>(gcount) *
             (static_cast<long double>(pcount) + prod);
    }
    const long double blocks = std::ceil(bits / 8.0L / 2880.0L);
    if (blocks * 2880.0L > static_cast<long double>(size)) return;  // longer than the file: CFITSIO reports it
    offset += static_cast<std::uint64_t>(blocks) * 2880;
  }
}

namespace {

// CFITSIO built without reentrancy support must not be entered by two threads.
std::recursive_mutex g_cfitsio_mutex;
struct CfitsioGuard {
  CfitsioGuard() : locked((initialise_cfitsio(), !fits_is_reentrant())) {
    if (locked) g_cfitsio_mutex.lock();
  }
  ~CfitsioGuard() {
    if (locked) g_cfitsio_mutex.unlock();
  }
  CfitsioGuard(const CfitsioGuard&) = delete;
  CfitsioGuard& operator=(const CfitsioGuard&) = delete;
  bool locked;
};

using header_text::one_line;
using header_text::trim;
using header_text::upper;
std::string lower(std::string s) {
  for (char& c : s) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return s;
}

/// CFITSIO status and its first stacked message as one line (the stack is cleared).
std::string cfitsio_text(int status) {
  char txt[FLEN_STATUS] = {0};
  fits_get_errstatus(status, txt);
  std::string first;
  char msg[FLEN_ERRMSG];
  while (fits_read_errmsg(msg)) {
    if (first.empty()) first = one_line(msg);
  }
  std::string s = one_line(txt);
  if (!first.empty() && lower(first) != lower(s)) s += " (" + first + ")";
  return "CFITSIO error " + std::to_string(status) + ": " + s;
}

struct FitsHandle {
  fitsfile* f = nullptr;
  ~FitsHandle() {
    if (f) {
      int s = 0;
      fits_close_file(f, &s);
      fits_clear_errmsg();
    }
  }
};

std::optional<std::string> key_string(fitsfile* f, const std::string& path, const char* key) {
  char value[FLEN_VALUE] = {0};
  int status = 0;
  if (fits_read_key(f, TSTRING, key, value, nullptr, &status)) {
    if (status == KEY_NO_EXIST || status == VALUE_UNDEFINED) {
      fits_clear_errmsg();
      return std::nullopt;
    }
    throw InputError(path, std::string("cannot read keyword ") + key + ": " + cfitsio_text(status));
  }
  return trim(value);
}

std::optional<double> key_double(fitsfile* f, const std::string& path, const char* key) {
  double v = 0.0;
  int status = 0;
  if (fits_read_key(f, TDOUBLE, key, &v, nullptr, &status)) {
    if (status == KEY_NO_EXIST || status == VALUE_UNDEFINED) {
      fits_clear_errmsg();
      return std::nullopt;
    }
    fits_clear_errmsg();
    throw InputError(path, std::string("keyword ") + key + " is not a number");
  }
  if (!std::isfinite(v)) throw InputError(path, std::string("keyword ") + key + " is not finite");
  return v;
}

std::string file_stem(const std::string& path) {
  std::string n = fs::path(path).filename().string();
  for (const char* ext : {".gz", ".fz", ".fits", ".fit", ".fts"}) {
    const std::string e(ext);
    if (n.size() > e.size() && lower(n.substr(n.size() - e.size())) == e) n.resize(n.size() - e.size());
  }
  return n;
}

/// Physical constants of the brightness-temperature conversion (REF-UNIT-04): the
/// Boltzmann constant [J/K] and the speed of light [m/s], both exact in the SI
/// since 2019 (BIPM SI Brochure, 9th ed.); 1 Jy = 1e-26 W m^-2 Hz^-1 (REF-UNIT-01).
constexpr double kBoltzmann = 1.380649e-23;
constexpr double kSpeedOfLight = 299792458.0;
constexpr double kJanskyPerSi = 1e26;

/// What a BUNIT string means to the reader.
enum class UnitKind { Unknown, JyPerBeam, JyPerPixel, Kelvin };
struct UnitReading {
  UnitKind kind = UnitKind::Unknown;
  double prefix = 1.0;  ///< SI prefix of the flux-density or temperature unit
};

/// Interpretation of BUNIT (FITS Standard 4.0 sec. 4.3 unit strings, IVOA VOUnits;
/// REF-UNIT-05): a product of factors separated by '.', '*' or spaces, with at
/// most one '/' (what follows it is divided), each factor a unit name with an
/// optional exponent ("beam-1", "beam^-1", "beam**-1"). Recognised: Jy with the
/// prefixes m and u (or the micro sign) per beam ("beam" or "bm"), Jy per pixel
/// ("pixel" or "pix"), and K (also mK, uK). "Jy" and "beam"/"pixel" are compared
/// without regard to letter case (legacy headers write "JY/BEAM"); the prefix and
/// "K" are case-sensitive ("MJY/BEAM" would be mega: refused as ambiguous).
UnitReading read_unit(const std::string& bunit) {
  // Split into (name, exponent) factors.
  std::vector<std::pair<std::string, int>> factors;
  bool seen_division = false, divide_next = false;
  std::size_t i = 0;
  const std::string& s = bunit;
  auto is_sep = [](char c) { return c == ' ' || c == '.' || c == '*'; };
  while (i < s.size()) {
    if (is_sep(s[i]) && !(s[i] == '*' && i + 1 < s.size() && s[i + 1] == '*')) {
      ++i;
      continue;
    }
    if (s[i] == '/') {
      if (seen_division) return {};  // one division only
      seen_division = divide_next = true;
      ++i;
      continue;
    }
    std::string name;
    while (i < s.size() && (std::isalpha(static_cast<unsigned char>(s[i])) ||
                            static_cast<unsigned char>(s[i]) >= 0x80))
      name += s[i++];
    if (name.empty()) return {};
    // Exponent: "^", "**" or nothing, then an optional sign and digits.
    if (i < s.size() && s[i] == '^') ++i;
    else if (i + 1 < s.size() && s[i] == '*' && s[i + 1] == '*') i += 2;
    int sign = 1, exponent = 1;
    if (i < s.size() && (s[i] == '-' || s[i] == '+')) sign = s[i++] == '-' ? -1 : 1;
    if (i < s.size() && std::isdigit(static_cast<unsigned char>(s[i]))) {
      exponent = 0;
      while (i < s.size() && std::isdigit(static_cast<unsigned char>(s[i])) && exponent < 100)
        exponent = exponent * 10 + (s[i++] - '0');
    } else if (sign < 0) {
      return {};  // a sign without digits
    }
    exponent *= sign;
    if (divide_next) exponent = -exponent;  // '/' divides the factor after it
    divide_next = false;
    factors.emplace_back(name, exponent);
  }
  int jy = 0, beam = 0, pixel = 0, kelvin = 0;
  double prefix = 1.0;
  for (const auto& factor : factors) {
    // Plain names, not a structured binding: the lambda below captures them.
    const std::string& name = factor.first;
    const int e = factor.second;
    const std::string low = lower(name);
    auto take_prefix = [&](const std::string& base) {
      // "" / "m" / "u" / micro sign (UTF-8 C2 B5) before a base unit.
      if (name.size() == base.size()) return 1.0;
      const std::string p = name.substr(0, name.size() - base.size());
      if (p == "m") return 1e-3;
      if (p == "u" || p == "\xc2\xb5") return 1e-6;
      return 0.0;
    };
    if (low.size() >= 2 && low.compare(low.size() - 2, 2, "jy") == 0) {
      const double f = take_prefix("jy");
      if (f == 0.0 || jy != 0) return {};
      jy = e;
      prefix = f;
    } else if (low == "beam" || low == "bm") {
      if (beam != 0) return {};
      beam = e;
    } else if (low == "pixel" || low == "pix") {
      if (pixel != 0) return {};
      pixel = e;
    } else if (name.back() == 'K') {
      const double f = take_prefix("K");
      if (f == 0.0 || kelvin != 0) return {};
      kelvin = e;
      prefix = f;
    } else {
      return {};
    }
  }
  if (jy == 1 && beam == -1 && pixel == 0 && kelvin == 0) return {UnitKind::JyPerBeam, prefix};
  if (jy == 1 && pixel == -1 && beam == 0 && kelvin == 0) return {UnitKind::JyPerPixel, prefix};
  if (kelvin == 1 && jy == 0 && beam == 0 && pixel == 0) return {UnitKind::Kelvin, prefix};
  return {};
}

/// A per-plane restoring beam from a beam table: a binary-table extension
/// EXTNAME = 'BEAMS' with columns BMAJ, BMIN (FWHM), BPA (east of north), CHAN
/// and POL (0-based plane indices along the spectral and the Stokes axis), the
/// angles in the units of TUNITn (arcsec when absent for BMAJ/BMIN, deg for BPA;
/// REF-FITS-08). Returns the row for (chan, pol) as (BMAJ, BMIN, BPA) in degrees,
/// nullopt when the file has no such table. The current HDU is `image_hdu` again
/// on return. A table without the columns or without a row for the plane is an
/// InputError.
struct TableBeam {
  double bmaj_deg = 0.0, bmin_deg = 0.0, bpa_deg = 0.0;
  long row = 0;  ///< 1-based
};
std::optional<TableBeam> beam_from_table(fitsfile* f, const std::string& path, int image_hdu, long chan, long pol) {
  int status = 0;
  char name[] = "BEAMS";
  if (fits_movnam_hdu(f, BINARY_TBL, name, 0, &status)) {
    fits_clear_errmsg();
    status = 0;
    int type = 0;
    fits_movabs_hdu(f, image_hdu, &type, &status);
    if (status) throw InputError(path, "cannot return to the image HDU: " + cfitsio_text(status));
    return std::nullopt;
  }
  struct Back {  // back to the image HDU however this function ends
    fitsfile* f;
    int hdu;
    ~Back() {
      int st = 0, type = 0;
      fits_movabs_hdu(f, hdu, &type, &st);
      fits_clear_errmsg();
    }
  } back{f, image_hdu};
  auto column = [&](const char* col) {
    int num = 0, st = 0;
    char templ[16];
    std::snprintf(templ, sizeof templ, "%s", col);
    if (fits_get_colnum(f, CASEINSEN, templ, &num, &st)) {
      fits_clear_errmsg();
      throw InputError(path, std::string("beam table BEAMS has no column ") + col);
    }
    return num;
  };
  const int c_maj = column("BMAJ"), c_min = column("BMIN"), c_pa = column("BPA"), c_chan = column("CHAN"),
            c_pol = column("POL");
  auto to_deg = [&](int col, const char* what, double dflt) {
    char key[16];
    std::snprintf(key, sizeof key, "TUNIT%d", col);
    char value[FLEN_VALUE] = {0};
    int st = 0;
    if (fits_read_key(f, TSTRING, key, value, nullptr, &st)) {
      fits_clear_errmsg();
      return dflt;
    }
    const std::string u = lower(trim(value));
    if (u == "arcsec" || u == "\"") return 1.0 / 3600.0;
    if (u == "arcmin" || u == "'") return 1.0 / 60.0;
    if (u == "deg" || u == "degree" || u == "degrees") return 1.0;
    if (u == "rad") return 180.0 / kPi;
    throw InputError(path, std::string("beam table BEAMS: ") + key + " '" + trim(value) + "' of " + what +
                               " is not arcsec, arcmin, deg or rad");
  };
  const double k_maj = to_deg(c_maj, "BMAJ", 1.0 / 3600.0), k_min = to_deg(c_min, "BMIN", 1.0 / 3600.0),
               k_pa = to_deg(c_pa, "BPA", 1.0);
  long nrows = 0;
  if (fits_get_num_rows(f, &nrows, &status))
    throw InputError(path, "cannot read the beam table BEAMS: " + cfitsio_text(status));
  if (nrows < 0 || nrows > 10000000) throw InputError(path, "beam table BEAMS has an impossible row count");
  std::vector<double> maj(static_cast<std::size_t>(nrows)), min(maj.size()), pa(maj.size());
  std::vector<long> ch(maj.size()), po(maj.size());
  if (nrows > 0) {
    double dnull = std::numeric_limits<double>::quiet_NaN();
    long lnull = -1;
    int anynul = 0;
    fits_read_col(f, TDOUBLE, c_maj, 1, 1, nrows, &dnull, maj.data(), &anynul, &status);
    fits_read_col(f, TDOUBLE, c_min, 1, 1, nrows, &dnull, min.data(), &anynul, &status);
    fits_read_col(f, TDOUBLE, c_pa, 1, 1, nrows, &dnull, pa.data(), &anynul, &status);
    fits_read_col(f, TLONG, c_chan, 1, 1, nrows, &lnull, ch.data(), &anynul, &status);
    fits_read_col(f, TLONG, c_pol, 1, 1, nrows, &lnull, po.data(), &anynul, &status);
    if (status) throw InputError(path, "cannot read the beam table BEAMS: " + cfitsio_text(status));
  }
  std::optional<TableBeam> found;
  for (std::size_t r = 0; r < maj.size(); ++r) {
    if (ch[r] != chan || po[r] != pol) continue;
    if (found)
      throw InputError(path, "beam table BEAMS has two rows (" + std::to_string(found->row) + " and " +
                                 std::to_string(r + 1) + ") for CHAN " + std::to_string(chan) + ", POL " +
                                 std::to_string(pol));
    if (!std::isfinite(maj[r]) || !std::isfinite(min[r]) || !std::isfinite(pa[r]))
      throw InputError(path, "beam table BEAMS row " + std::to_string(r + 1) + " holds a value that is not a number");
    found = TableBeam{maj[r] * k_maj, min[r] * k_min, pa[r] * k_pa, static_cast<long>(r + 1)};
  }
  if (!found)
    throw InputError(path, "beam table BEAMS has no row for the plane measured (CHAN " + std::to_string(chan) +
                               ", POL " + std::to_string(pol) + ")");
  return found;
}

/// Every card of the current HDU, 80 characters each (HISTORY and COMMENT included).
std::string all_cards(fitsfile* f, const std::string& path) {
  int status = 0, nkeys = 0;
  if (fits_get_hdrspace(f, &nkeys, nullptr, &status))
    throw InputError(path, "cannot read the header: " + cfitsio_text(status));
  std::string out;
  out.reserve(static_cast<std::size_t>(nkeys) * 80);
  char card[FLEN_CARD];
  for (int k = 1; k <= nkeys; ++k) {
    if (fits_read_record(f, k, card, &status))
      throw InputError(path, "cannot read header card " + std::to_string(k) + ": " + cfitsio_text(status));
    std::string c(card);
    c.resize(80, ' ');
    out += c;
  }
  return out;
}

/// The restoring beam from AIPS-style HISTORY cards ("HISTORY AIPS   CLEAN BMAJ=
/// 1.3889E-03 BMIN=  1.3889E-03 BPA=   0.00", degrees; REF-FITS-07): the last card
/// that names CLEAN and gives BMAJ= and BMIN= (later CLEAN runs append theirs).
/// Returns (BMAJ, BMIN, BPA or nullopt, card number) of that card.
struct HistoryBeam {
  double bmaj = 0.0, bmin = 0.0;
  std::optional<double> bpa;
  int card = 0;  ///< 1-based card number in the header
};
std::optional<HistoryBeam> beam_from_history(const std::string& header) {
  std::optional<HistoryBeam> found;
  auto number_after = [](std::string_view text, std::string_view tag) -> std::optional<double> {
    const auto at = text.find(tag);
    if (at == std::string_view::npos) return std::nullopt;
    std::string v(text.substr(at + tag.size()));
    std::size_t k = 0;
    while (k < v.size() && v[k] == ' ') ++k;
    std::size_t e = k;
    while (e < v.size() && v[e] != ' ') ++e;
    std::string num = v.substr(k, e - k);
    for (char& c : num)
      if (c == 'D' || c == 'd') c = 'E';  // FORTRAN double-precision exponent
    double out = 0.0;
    const auto r = std::from_chars(num.data(), num.data() + num.size(), out);
    if (num.empty() || r.ec != std::errc() || r.ptr != num.data() + num.size() || !std::isfinite(out))
      return std::nullopt;
    return out;
  };
  for (std::size_t c = 0; c + 80 <= header.size(); c += 80) {
    const std::string_view card(header.data() + c, 80);
    if (card.substr(0, 8) != "HISTORY ") continue;
    const std::string_view text = card.substr(8);
    const auto clean = text.find("CLEAN");
    if (clean == std::string_view::npos) continue;
    const std::string_view rest = text.substr(clean);
    const auto bmaj = number_after(rest, "BMAJ=");
    const auto bmin = number_after(rest, "BMIN=");
    if (!bmaj || !bmin) continue;
    found = HistoryBeam{*bmaj, *bmin, number_after(rest, "BPA="), static_cast<int>(c / 80) + 1};
  }
  return found;
}

constexpr const char* kStructural[] = {"SIMPLE", "BITPIX", "NAXIS", "EXTEND", "BSCALE", "BZERO",
                                       "BLANK", "BUNIT", "PCOUNT", "GCOUNT", "XTENSION", "END",
                                       "CHECKSUM", "DATASUM"};

bool is_structural(const std::string& key) {
  for (const char* k : kStructural)
    if (key == k) return true;
  // NAXISn
  if (key.rfind("NAXIS", 0) == 0 &&
      std::all_of(key.begin() + 5, key.end(), [](char c) { return std::isdigit(static_cast<unsigned char>(c)); }))
    return true;
  return false;
}

std::uint64_t physical_memory_bytes() {
  const long pages = ::sysconf(_SC_PHYS_PAGES);
  const long page = ::sysconf(_SC_PAGESIZE);
  if (pages <= 0 || page <= 0) return std::numeric_limits<std::uint64_t>::max();
  return static_cast<std::uint64_t>(pages) * static_cast<std::uint64_t>(page);
}

std::string gib(std::uint64_t bytes) {
  char buf[32];
  std::snprintf(buf, sizeof buf, "%.3g GiB", static_cast<double>(bytes) / (1024.0 * 1024.0 * 1024.0));
  return buf;
}

/// Move to the HDU the options ask for. Returns its 1-based number.
int select_hdu(fitsfile* f, const std::string& path, const std::string& hdu) {
  int status = 0, type = 0;
  if (hdu.empty()) {
    int naxis = 0;
    if (fits_get_img_dim(f, &naxis, &status))
      throw InputError(path, "cannot read the primary header: " + cfitsio_text(status));
    if (naxis > 0) return 1;
    // Empty primary: the first image extension with data (tile-compressed images
    // are presented as image HDUs by CFITSIO).
    for (int n = 2;; ++n) {
      status = 0;
      if (fits_movabs_hdu(f, n, &type, &status)) {
        fits_clear_errmsg();
        if (status == END_OF_FILE || status == BAD_HDU_NUM)
          throw InputError(path, "holds no image (empty primary HDU and no image extension)");
        throw InputError(path, "cannot read HDU " + std::to_string(n) + ": " + cfitsio_text(status));
      }
      if (type != IMAGE_HDU) continue;
      if (fits_get_img_dim(f, &naxis, &status))
        throw InputError(path, "cannot read HDU " + std::to_string(n) + ": " + cfitsio_text(status));
      if (naxis > 0) return n;
    }
  }
  if (std::all_of(hdu.begin(), hdu.end(), [](char c) { return std::isdigit(static_cast<unsigned char>(c)); })) {
    long n = 0;
    try {
      n = std::stol(hdu);
    } catch (const std::exception&) {
      n = -1;
    }
    if (n < 1 || n > 100000) throw InputError(path, "HDU number " + hdu + " is not valid (1 = primary)");
    if (fits_movabs_hdu(f, static_cast<int>(n), &type, &status)) {
      fits_clear_errmsg();
      throw InputError(path, "has no HDU " + hdu + " (HDUs are counted from 1 = primary)");
    }
    if (type != IMAGE_HDU) throw InputError(path, "HDU " + hdu + " is a table, not an image");
    return static_cast<int>(n);
  }
  std::vector<char> name(hdu.begin(), hdu.end());
  name.push_back('\0');
  if (fits_movnam_hdu(f, ANY_HDU, name.data(), 0, &status)) {
    fits_clear_errmsg();
    throw InputError(path, "has no extension named '" + hdu + "'");
  }
  fits_get_hdu_type(f, &type, &status);
  if (type != IMAGE_HDU) throw InputError(path, "extension '" + hdu + "' is a table, not an image");
  int num = 0;
  fits_get_hdu_num(f, &num);
  return num;
}

}  // namespace

SkyImage read_sky_image(const std::string& path, const ImageReadOptions& opt) {
  std::error_code ec;
  const auto st = fs::status(path, ec);
  if (ec || !fs::exists(st)) throw InputError(path, "file not found");
  if (fs::is_directory(st)) throw InputError(path, "is a folder, not a FITS file");
  {
    std::ifstream in(path, std::ios::binary);
    if (!in) throw InputError(path, std::string("cannot be read: ") + std::strerror(errno));
    char head[10] = {0};
    in.read(head, 9);
    const auto got = in.gcount();
    const bool gz = got >= 2 && static_cast<unsigned char>(head[0]) == 0x1f &&
                    static_cast<unsigned char>(head[1]) == 0x8b;
    if (got == 0) throw InputError(path, "is empty, not a FITS file");
    if (!gz && (got < 9 || std::memcmp(head, "SIMPLE  =", 9) != 0))
      throw InputError(path, "not a FITS file (does not start with SIMPLE  =)");
  }
  check_fits_header_text(path);

  CfitsioGuard guard;
  FitsHandle fits;
  int status = 0;
  if (fits_open_diskfile(&fits.f, path.c_str(), READONLY, &status)) {
    fits.f = nullptr;
    throw InputError(path, "cannot open as FITS: " + cfitsio_text(status));
  }
  fitsfile* f = fits.f;
  const int hdu_num = select_hdu(f, path, opt.hdu);
  const std::string where = hdu_num == 1 ? std::string() : " (HDU " + std::to_string(hdu_num) + ")";

  int bitpix = 0, naxis = 0;
  LONGLONG naxes[9] = {0};
  if (fits_get_img_paramll(f, 9, &bitpix, &naxis, naxes, &status))
    throw InputError(path, "cannot read the image dimensions" + where + ": " + cfitsio_text(status));
  if (naxis < 2 || naxis > 4)
    throw InputError(path, "image" + where + " has " + std::to_string(naxis) +
                               " axes; 2 to 4 are supported (x, y, optional frequency and Stokes)");
  std::uint64_t nelem = 1;
  std::string dims;
  for (int k = 0; k < naxis; ++k) {
    if (naxes[k] < 1)
      throw InputError(path, "NAXIS" + std::to_string(k + 1) + " = " + std::to_string(naxes[k]) +
                                 ": the image" + where + " has no pixels");
    dims += (k ? " x " : "") + std::to_string(naxes[k]);
    if (__builtin_mul_overflow(nelem, static_cast<std::uint64_t>(naxes[k]), &nelem))
      throw InputError(path, "axis lengths " + dims + "... overflow a 64-bit pixel count");
  }
  std::uint64_t data_bytes = 0;
  if (__builtin_mul_overflow(nelem, static_cast<std::uint64_t>(std::abs(bitpix) / 8), &data_bytes))
    throw InputError(path, "axis lengths " + dims + " overflow a 64-bit byte count");

  int compressed = fits_is_compressed_image(f, &status);
  status = 0;
  if (!compressed) {
    // Truncated data or a header lying about its axis lengths: the header promises
    // more data bytes than the (uncompressed) file holds. Checked before anything
    // is allocated or read.
    LONGLONG headstart = 0, datastart = 0, dataend = 0;
    if (fits_get_hduaddrll(f, &headstart, &datastart, &dataend, &status))
      throw InputError(path, "cannot locate the image data" + where + ": " + cfitsio_text(status));
    const LONGLONG file_size = f->Fptr->logfilesize;
    const std::uint64_t have =
        file_size > datastart ? static_cast<std::uint64_t>(file_size - datastart) : 0;
    if (have < data_bytes)
      throw InputError(path, "truncated: the header" + where + " declares " + dims + " pixels of " +
                                 std::to_string(std::abs(bitpix) / 8) + " bytes (" +
                                 std::to_string(data_bytes) + " bytes of data) but the file holds " +
                                 std::to_string(have) + " after the header");
  }
  const long nx = static_cast<long>(naxes[0]), ny = static_cast<long>(naxes[1]);
  std::uint64_t plane_bytes = 0;
  if (__builtin_mul_overflow(static_cast<std::uint64_t>(nx) * static_cast<std::uint64_t>(ny),
                             sizeof(float), &plane_bytes) ||
      plane_bytes > physical_memory_bytes())
    throw InputError(path, "image plane of " + std::to_string(nx) + " x " + std::to_string(ny) +
                               " pixels needs " + gib(plane_bytes) + ", more than this machine's " +
                               gib(physical_memory_bytes()) + " of memory");

  // Plane along the extra axes.
  long plane_at[5] = {0, 0, 0, 0, 0};  // 0-based index per axis (axes 3 and 4)
  std::size_t used = 0;
  for (int k = 2; k < naxis; ++k) {
    if (naxes[k] == 1) continue;
    const std::string key = "CTYPE" + std::to_string(k + 1);
    const auto ctype = key_string(f, path, key.c_str());
    const std::string axis_desc = "axis " + std::to_string(k + 1) +
                                  (ctype ? " (" + *ctype + ")" : std::string()) + " has " +
                                  std::to_string(naxes[k]) + " planes";
    if (used >= opt.plane.size())
      throw InputError(path, axis_desc + ": choose one with the plane option (0-based)");
    const long p = opt.plane[used++];
    if (p < 0 || p >= naxes[k])
      throw InputError(path, axis_desc + ": plane index " + std::to_string(p) + " is outside 0.." +
                                 std::to_string(naxes[k] - 1));
    plane_at[k] = p;
  }
  if (used < opt.plane.size())
    throw InputError(path, "the plane option gives " + std::to_string(opt.plane.size()) +
                               " indices but the image" + where + " has " + std::to_string(used) +
                               " axes of more than one plane");

  // World coordinates.
  char* hdr = nullptr;
  int nkeys = 0;
  if (compressed)
    fits_convert_hdr2str(f, 1, nullptr, 0, &hdr, &nkeys, &status);
  else
    fits_hdr2str(f, 1, nullptr, 0, &hdr, &nkeys, &status);
  if (status) {
    if (hdr) fits_free_memory(hdr, &status);
    throw InputError(path, "cannot read the header" + where + ": " + cfitsio_text(status));
  }
  std::string header(hdr, std::strlen(hdr));
  {
    int s2 = 0;
    fits_free_memory(hdr, &s2);
  }
  SkyImage out;
  out.path = path;
  std::string cards2d;
  try {
    out.wcs = wcs_from_header(header, &out.frame, &cards2d);
  } catch (const std::invalid_argument& e) {
    throw InputError(path, e.what());
  }

  // BUNIT: read here, converted once the beam and the frequency are known.
  const auto bunit = key_string(f, path, "BUNIT");
  out.bunit = bunit.value_or("");
  const UnitReading unit = bunit ? read_unit(*bunit) : UnitReading{};
  const std::string accept_hint =
      opt.accept_bunit_option.empty() ? std::string("an override takes the values as Jy/beam without conversion")
                                      : opt.accept_bunit_option + " = true takes the values as Jy/beam without conversion";
  if (unit.kind == UnitKind::Unknown && !opt.accept_any_bunit) {
    if (!bunit || bunit->empty())
      throw InputError(path, "has no BUNIT (expected Jy/beam, K or Jy/pixel; " + accept_hint + ")");
    throw InputError(path, "BUNIT '" + *bunit +
                               "' is not Jy/beam, K or Jy/pixel (the units skerry converts; " + accept_hint + ")");
  }

  // Restoring beam: the override; else the plane's row of a beam table; else
  // BMAJ/BMIN/BPA; else AIPS-style HISTORY cards.
  if (opt.beam_override) {
    if (!opt.beam_override->valid())
      throw UsageError("the beam override is not a valid beam (need maj >= min > 0)");
    out.beam = *opt.beam_override;
    out.beam_origin = "option";
  } else {
    const auto bmaj_key = key_double(f, path, "BMAJ");
    const auto bmin_key = key_double(f, path, "BMIN");
    std::optional<double> bmaj = bmaj_key, bmin = bmin_key, bpa;
    std::string what = "beam BMAJ = ";  // how messages name the values
    std::string origin = "keywords";
    // The plane along the spectral and the Stokes axis, for a beam table.
    long chan = 0, pol = 0;
    for (int k = 2; k < naxis; ++k) {
      const auto ctype = key_string(f, path, ("CTYPE" + std::to_string(k + 1)).c_str());
      if (!ctype) continue;
      if (upper(*ctype).rfind("STOKES", 0) == 0) pol = plane_at[k];
      else chan = plane_at[k];
    }
    const auto table = beam_from_table(f, path, hdu_num, chan, pol);
    if (table) {
      bmaj = table->bmaj_deg;
      bmin = table->bmin_deg;
      bpa = table->bpa_deg;
      what = "beam table BEAMS row " + std::to_string(table->row) + ": beam BMAJ = ";
      origin = "beam_table";
    } else if (bmaj && bmin) {
      bpa = key_double(f, path, "BPA");
    } else if (const auto h = beam_from_history(all_cards(f, path))) {
      bmaj = h->bmaj;
      bmin = h->bmin;
      bpa = h->bpa;
      what = "HISTORY card " + std::to_string(h->card) + ": beam BMAJ = ";
      origin = "history";
    }
    if (bmaj && bmin) {
      if (!(*bmaj > 0.0 && *bmin > 0.0)) {
        if (opt.require_beam)
          throw InputError(path, what + fits_real(*bmaj) + ", BMIN = " + fits_real(*bmin) +
                                     " deg is not positive (give the beam explicitly)");
      } else {
        double maj = *bmaj, min = *bmin, pa = 0.0;
        if (bpa) {
          pa = *bpa;
        } else if (std::abs(maj - min) > 1e-9 * maj) {
          if (opt.require_beam)
            throw InputError(path, origin == "history"
                                       ? what.substr(0, what.find(':')) + " gives BMAJ and BMIN but no BPA for an elliptical beam"
                                       : std::string("has BMAJ and BMIN but no BPA for an elliptical beam"));
          maj = min = 0.0;
        }
        if (min > maj) {  // same ellipse, axes named the other way round
          std::swap(maj, min);
          pa += 90.0;
        }
        pa = std::fmod(pa, 180.0);
        if (pa < 0.0) pa += 180.0;
        out.beam = Beam{maj * kDegToArcsec, min * kDegToArcsec, pa};
        if (out.beam.valid()) out.beam_origin = origin;
      }
    } else if (opt.require_beam) {
      throw InputError(path, std::string("has no restoring beam (") + (bmaj ? "BMIN" : "BMAJ") +
                                 " missing, and no HISTORY card of a CLEAN gives BMAJ= and BMIN=; give the beam explicitly)");
    }
  }

  // Observing frequency.
  if (opt.freq_hz_override) {
    if (!(*opt.freq_hz_override > 0.0) || !std::isfinite(*opt.freq_hz_override))
      throw UsageError("the frequency override must be a positive number of Hz");
    out.freq_hz = *opt.freq_hz_override;
  } else {
    for (int k = 2; k < 4 && !std::isfinite(out.freq_hz); ++k) {
      const std::string n = std::to_string(k + 1);
      const auto ctype = key_string(f, path, ("CTYPE" + n).c_str());
      if (!ctype || upper(*ctype).rfind("FREQ", 0) != 0) continue;
      const auto crval = key_double(f, path, ("CRVAL" + n).c_str());
      if (!crval) throw InputError(path, "spectral axis " + n + " (FREQ) has no CRVAL" + n);
      // Paper I: world = CRVAL + CDELT (p - CRPIX); FITS defaults CDELT = 1, CRPIX = 0.
      auto cdelt = key_double(f, path, ("CDELT" + n).c_str());
      if (!cdelt) cdelt = key_double(f, path, ("CD" + n + "_" + n).c_str());
      const double crpix = key_double(f, path, ("CRPIX" + n).c_str()).value_or(0.0);
      const double pix1 = static_cast<double>(plane_at[k]) + 1.0;
      const std::string cunit = key_string(f, path, ("CUNIT" + n).c_str()).value_or("Hz");
      double to_hz = 0.0;
      const std::string u = lower(cunit);
      if (u == "hz" || u.empty()) to_hz = 1.0;
      else if (u == "khz") to_hz = 1e3;
      else if (cunit == "MHz" || cunit == "MHZ") to_hz = 1e6;
      else if (u == "ghz") to_hz = 1e9;
      else throw InputError(path, "CUNIT" + n + " '" + cunit + "' of the FREQ axis is not Hz, kHz, MHz or GHz");
      const double fhz = (*crval + cdelt.value_or(1.0) * (pix1 - crpix)) * to_hz;
      if (!(fhz > 0.0)) throw InputError(path, "frequency of the chosen plane is not positive");
      out.freq_hz = fhz;
    }
    for (const char* key : {"FREQ", "RESTFRQ", "RESTFREQ"}) {
      if (std::isfinite(out.freq_hz)) break;
      if (const auto v = key_double(f, path, key)) {
        if (!(*v > 0.0)) throw InputError(path, std::string("keyword ") + key + " is not a positive frequency");
        out.freq_hz = *v;
      }
    }
  }
  // Conversion of the values to Jy/beam (REF-UNIT-05).
  const std::string beam_hint = opt.beam_option.empty() ? std::string() : "; give " + opt.beam_option;
  const std::string freq_hint = opt.freq_option.empty() ? std::string() : "; give " + opt.freq_option;
  switch (unit.kind) {
    case UnitKind::JyPerBeam:
      out.bunit_scale = unit.prefix;
      out.bunit_rule = unit.prefix == 1.0 ? "Jy/beam: as stored" : "Jy/beam with an SI prefix: x " + fits_real(unit.prefix);
      break;
    case UnitKind::Kelvin: {
      // Rayleigh-Jeans brightness temperature (REF-UNIT-04): S [Jy/beam] =
      // 2 k_B nu^2 T Omega_beam / c^2 x 1e26, Omega_beam = pi theta_maj theta_min /
      // (4 ln 2) [sr] (REF-GAUSS-03); k_B [J/K], nu [Hz], c [m/s], T [K].
      const bool have_beam = out.beam.valid(), have_freq = std::isfinite(out.freq_hz);
      if (!have_beam || !have_freq) {
        if (opt.accept_any_bunit) {
          out.bunit_rule = "not converted (" + std::string(have_beam ? "no frequency" : "no beam") +
                           "): taken as Jy/beam by the override";
          break;
        }
        throw InputError(path, "BUNIT '" + out.bunit + "' (brightness temperature) needs the restoring beam and the "
                               "observing frequency to become Jy/beam, but the image has no " +
                               (have_beam ? "observing frequency (FREQ axis, FREQ or RESTFRQ keyword)" + freq_hint
                                          : "restoring beam (BMAJ/BMIN or a CLEAN HISTORY card)" + beam_hint));
      }
      const double omega_sr = kGaussAreaFactor * out.beam.maj_arcsec * kArcsecToRad * out.beam.min_arcsec * kArcsecToRad;
      const double per_kelvin = 2.0 * kBoltzmann * out.freq_hz * out.freq_hz * omega_sr /
                                (kSpeedOfLight * kSpeedOfLight) * kJanskyPerSi;
      out.bunit_scale = unit.prefix * per_kelvin;
      out.bunit_rule = "K to Jy/beam (Rayleigh-Jeans, REF-UNIT-04): 2 k nu^2 Omega_beam / c^2 x 1e26 with nu = " +
                       fits_real(out.freq_hz) + " Hz, Omega_beam = " + fits_real(omega_sr) + " sr" +
                       (unit.prefix == 1.0 ? std::string() : ", prefix x " + fits_real(unit.prefix)) +
                       ": x " + fits_real(out.bunit_scale);
      break;
    }
    case UnitKind::JyPerPixel: {
      // Jy/pixel to Jy/beam: x Omega_beam / Omega_pixel, the beam area in pixels at
      // the image centre (REF-UNIT-06, REF-GAUSS-03).
      const auto g = local_geometry(*out.wcs, 0.5 * static_cast<double>(nx - 1), 0.5 * static_cast<double>(ny - 1));
      if (!out.beam.valid() || !g || !(g->pixel_area_arcsec2 > 0.0)) {
        if (opt.accept_any_bunit) {
          out.bunit_rule = std::string("not converted (") + (out.beam.valid() ? "no pixel area" : "no beam") +
                           "): taken as Jy/beam by the override";
          break;
        }
        if (!out.beam.valid())
          throw InputError(path, "BUNIT '" + out.bunit + "' needs the restoring beam to become Jy/beam, but the image "
                                 "has none (BMAJ/BMIN or a CLEAN HISTORY card)" + beam_hint);
        throw InputError(path, "BUNIT '" + out.bunit + "' needs the pixel area at the image centre to become Jy/beam, "
                               "but the centre has no sky position");
      }
      const double beam_pixels = kGaussAreaFactor * out.beam.maj_arcsec * out.beam.min_arcsec / g->pixel_area_arcsec2;
      out.bunit_scale = unit.prefix * beam_pixels;
      out.bunit_rule = "Jy/pixel to Jy/beam (REF-UNIT-06): x Omega_beam / Omega_pixel = " + fits_real(beam_pixels) +
                       " pixels per beam at the image centre" +
                       (unit.prefix == 1.0 ? std::string() : ", prefix x " + fits_real(unit.prefix)) +
                       ": x " + fits_real(out.bunit_scale);
      break;
    }
    case UnitKind::Unknown:
      out.bunit_rule = "not converted: BUNIT '" + out.bunit + "' taken as Jy/beam by the override";
      break;
  }

  out.object = key_string(f, path, "OBJECT").value_or("");
  if (out.object.empty()) out.object = file_stem(path);

  // Pixels of the chosen plane: CFITSIO applies BSCALE/BZERO and turns BLANK (and
  // NaN) into the null value NaN.
  out.pixels.resize(ny, nx);
  long fpixel[4] = {1, 1, 1, 1}, lpixel[4] = {nx, ny, 1, 1}, inc[4] = {1, 1, 1, 1};
  for (int k = 2; k < naxis; ++k) fpixel[k] = lpixel[k] = plane_at[k] + 1;
  float nulval = std::numeric_limits<float>::quiet_NaN();
  int anynul = 0;
  if (fits_read_subset(f, TFLOAT, fpixel, lpixel, inc, &nulval, out.pixels.data(), &anynul, &status))
    throw InputError(path, "cannot read the pixels" + where + ": " + cfitsio_text(status));

  std::size_t finite = 0;
  float* px = out.pixels.data();
  const std::size_t npix = static_cast<std::size_t>(nx) * static_cast<std::size_t>(ny);
  const float fscale = static_cast<float>(out.bunit_scale);
  for (std::size_t i = 0; i < npix; ++i) {
    if (std::isfinite(px[i])) {
      ++finite;
      if (fscale != 1.0f) px[i] *= fscale;
    } else {
      px[i] = std::numeric_limits<float>::quiet_NaN();  // +-inf is no data too
    }
  }
  if (finite == 0 && !opt.allow_all_blank)
    throw NoDataError(path, "every pixel of the image" + where + " is blank (NaN or BLANK)");

  out.wcs_header = fits_card("NAXIS", "2") + fits_card("NAXIS1", std::to_string(nx)) +
                   fits_card("NAXIS2", std::to_string(ny)) + cards2d;
  if (out.beam.valid()) {
    out.wcs_header += fits_card("BMAJ", fits_real(out.beam.maj_arcsec * kArcsecToDeg), "beam major FWHM [deg]");
    out.wcs_header += fits_card("BMIN", fits_real(out.beam.min_arcsec * kArcsecToDeg), "beam minor FWHM [deg]");
    out.wcs_header += fits_card("BPA", fits_real(out.beam.pa_deg), "beam PA east of north [deg]");
  }
  if (std::isfinite(out.freq_hz))
    out.wcs_header += fits_card("FREQ", fits_real(out.freq_hz), "observing frequency [Hz]");
  return out;
}

SkyImage make_sky_image(const GridSpec& grid, ImageF pixels, const std::string& object) {
  if (pixels.rows() != grid.ny || pixels.cols() != grid.nx)
    throw std::invalid_argument("make_sky_image: pixel array shape differs from the grid");
  SkyImage im;
  im.wcs_header = header_for_grid(grid);
  im.wcs = wcs_from_header(im.wcs_header, &im.frame);
  im.pixels = std::move(pixels);
  im.beam = grid.beam;
  if (grid.freq_hz > 0.0) im.freq_hz = grid.freq_hz;
  im.bunit = "Jy/beam";
  im.object = object;
  return im;
}

ImageF read_primary_beam(const std::string& path, const SkyImage& like) {
  ImageReadOptions o;
  o.accept_any_bunit = true;
  o.require_beam = false;
  SkyImage pb = read_sky_image(path, o);
  if (pb.pixels.rows() != like.pixels.rows() || pb.pixels.cols() != like.pixels.cols())
    throw InputError(path, "primary beam is " + std::to_string(pb.pixels.cols()) + " x " +
                               std::to_string(pb.pixels.rows()) + " pixels but the image is " +
                               std::to_string(like.pixels.cols()) + " x " +
                               std::to_string(like.pixels.rows()));
  if (like.wcs) {
    const double w = static_cast<double>(like.pixels.cols() - 1), h = static_cast<double>(like.pixels.rows() - 1);
    const double pts[5][2] = {{0, 0}, {w, 0}, {0, h}, {w, h}, {0.5 * w, 0.5 * h}};
    for (const auto& p : pts) {
      double ra, dec, x, y;
      if (!like.wcs->pix_to_sky(p[0], p[1], ra, dec)) continue;
      if (!pb.wcs->sky_to_pix(ra, dec, x, y) || std::hypot(x - p[0], y - p[1]) > 0.01)
        throw InputError(path, "primary beam is not on the image's pixel grid (pixel (" +
                                   std::to_string(static_cast<long>(p[0])) + ", " +
                                   std::to_string(static_cast<long>(p[1])) + ") differs)");
    }
  }
  float* v = pb.pixels.data();
  for (Eigen::Index i = 0; i < pb.pixels.size(); ++i) {
    if (!std::isfinite(v[i])) continue;
    if (v[i] > 1.001f)
      throw InputError(path, "primary-beam value " + fits_real(v[i]) + " exceeds 1 (expected a gain in (0, 1])");
    if (v[i] <= 0.0f) v[i] = std::numeric_limits<float>::quiet_NaN();
  }
  return std::move(pb.pixels);
}

namespace {

/// Writes `n` pixels of 4 bytes each as the data unit of a FITS file whose header
/// CFITSIO has written and closed: `data_start` is the byte offset of the data
/// unit (a multiple of 2880). FITS Standard 4.0 (REF-FITS-02), sections 3.3.2 and
/// 5.3: BITPIX -32 is IEEE-754 binary32 and BITPIX 32 two's-complement int32, both
/// big-endian, and the data unit is padded with zeros to a multiple of 2880 bytes.
/// The pixels' bit patterns are byte-swapped unchanged (NaN payloads included).
///
/// Why not fits_write_img: CFITSIO writes through its 2880-byte buffers into the
/// page cache, and copying a 256 MB map into the page cache cost ~0.6 s of kernel
/// CPU per map on the 2-core benchmark machine, on the same cores as the fit. Here
/// the bulk of the data unit (the 4096-byte-aligned middle) goes from an aligned
/// buffer straight to the device with O_DIRECT: ~0.05 s of CPU per map. The head
/// and tail around the aligned middle, and file systems that refuse O_DIRECT
/// (EINVAL on open or on the first write), use ordinary buffered pwrite, as does
/// everything when the environment sets SKERRY_NO_DIRECT_IO=1 (for file systems
/// where O_DIRECT is slow or unsafe). The bytes on disk are the same either way
/// (tests/io/fits_image_test.cpp compares them with CFITSIO's own fits_write_img
/// output). Durability is AtomicOutput's fsync.
void write_data_unit(const std::string& path, const std::string& temp, std::int64_t data_start,
                     const std::uint32_t* words, std::int64_t n) {
  constexpr std::int64_t kBlock = 2880, kAlign = 4096, kChunk = 8 << 20;  // bytes
  static_assert(__BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__, "the data-unit writer assumes a little-endian host");
  const std::int64_t nbytes = 4 * n;
  const std::int64_t file_end = data_start + (nbytes + kBlock - 1) / kBlock * kBlock;
  auto fail = [&](const std::string& what, int err) { throw OutputError(path, what + ": " + std::strerror(err)); };
  struct Fd {
    int fd = -1;
    ~Fd() {
      if (fd >= 0) ::close(fd);
    }
  } buffered, direct;
  buffered.fd = ::open(temp.c_str(), O_WRONLY | O_CLOEXEC);
  if (buffered.fd < 0) fail("cannot reopen the temporary file", errno);
  struct stat st {};
  if (::fstat(buffered.fd, &st) != 0) fail("write failed", errno);
  if (st.st_size > file_end || st.st_size < data_start)
    throw OutputError(path, "CFITSIO left " + std::to_string(st.st_size) + " bytes where the header ends at " +
                                std::to_string(data_start) + " and the data unit at " + std::to_string(file_end));
  // The zero padding (and the whole data unit, until written) comes from extending the file.
  if (::ftruncate(buffered.fd, file_end) != 0) fail("write failed", errno);

  // Big-endian copy of pixels [first, first + count) into dst (4-byte words).
  auto encode = [words](std::int64_t first, std::int64_t count, std::uint32_t* dst) {
    const std::uint32_t* src = words + first;
    for (std::int64_t i = 0; i < count; ++i) dst[i] = __builtin_bswap32(src[i]);
  };

  std::int64_t a = (data_start + kAlign - 1) / kAlign * kAlign;  // first aligned byte
  std::int64_t b = (data_start + nbytes) / kAlign * kAlign;       // end of the aligned middle
  const char* no_direct = std::getenv("SKERRY_NO_DIRECT_IO");     // README, "Environment"
  if (b > a && !(no_direct && *no_direct && std::string_view(no_direct) != "0")) {
    direct.fd = ::open(temp.c_str(), O_WRONLY | O_CLOEXEC | O_DIRECT);
    if (direct.fd < 0 && errno != EINVAL) fail("cannot reopen the temporary file", errno);
  }
  if (direct.fd < 0) a = b = data_start + nbytes;  // all buffered
  struct Free {
    void operator()(void* p) const { std::free(p); }
  };
  // Every range written below is at most min(kChunk, nbytes) long.
  const std::int64_t buf_bytes = (std::min(kChunk, nbytes) + kAlign - 1) / kAlign * kAlign;
  std::unique_ptr<std::uint32_t, Free> buf(
      static_cast<std::uint32_t*>(std::aligned_alloc(kAlign, static_cast<std::size_t>(buf_bytes))));
  if (!buf) throw OutputError(path, "cannot allocate a write buffer");
  // Byte range [lo, hi) of the file, written through fd in chunks.
  auto write_range = [&](int fd, std::int64_t lo, std::int64_t hi) -> int {
    for (std::int64_t off = lo; off < hi; off += kChunk) {
      const std::int64_t len = std::min(kChunk, hi - off);
      encode((off - data_start) / 4, len / 4, buf.get());
      if (const int e = write_fully_at(fd, reinterpret_cast<const char*>(buf.get()), static_cast<std::size_t>(len), off))
        return e;
    }
    return 0;
  };
  if (const int e = write_range(buffered.fd, data_start, a)) fail("write failed", e);
  if (b > a) {
    int e = write_range(direct.fd, a, b);
    if (e == EINVAL) e = write_range(buffered.fd, a, b);  // the device refused the alignment
    if (e) fail("write failed", e);
  }
  if (const int e = write_range(buffered.fd, b, data_start + nbytes)) fail("write failed", e);
  if (direct.fd >= 0 && ::close(std::exchange(direct.fd, -1)) != 0) fail("write failed", errno);
  if (::close(std::exchange(buffered.fd, -1)) != 0) fail("write failed", errno);
}

/// Sets CFITSIO's tile compression for the next image HDU (FITS Standard 4.0 sec. 10,
/// "tiled image compression", REF-FITS-06). Tiles are 64 rows: large enough for
/// Rice/GZIP to find runs, small enough that a reader decompresses little to
/// reach one region.
///  - Lossless, int32: Rice (Pence, Seaman & White 2009); every value is kept.
///  - Lossless, float32: GZIP with byte shuffling (GZIP_2) on the IEEE-754 bytes;
///    every bit is kept (quantize level 0 means "do not quantise" in CFITSIO).
///  - Quantised, float32: values are stored as round((v - z) / step) with the
///    given absolute step (CFITSIO: a negative quantize level is an absolute
///    step, in the image's units) and no dithering (the maps are smooth and the
///    output must be the same bytes for the same input), then Rice-coded; the
///    value read back is within step / 2 of the value written (Pence, White & Seaman 2010).
void set_compression(fitsfile* f, int bitpix, long nx, const MapStorage& storage, int& status) {
  long tile[2] = {nx, 64};
  if (storage.kind == MapStorage::Kind::Quantised) {
    fits_set_compression_type(f, RICE_1, &status);
    fits_set_quantize_level(f, static_cast<float>(-storage.step), &status);
    fits_set_quantize_method(f, NO_DITHER, &status);
  } else if (bitpix == LONG_IMG) {
    fits_set_compression_type(f, RICE_1, &status);
  } else {
    fits_set_compression_type(f, GZIP_2, &status);
    fits_set_quantize_level(f, 0.0f, &status);
  }
  fits_set_tile_dim(f, 2, tile, &status);
}

void write_image(const std::string& path, int bitpix, const void* data, long nx,
                 long ny, const SkyImage& like, const std::string* bunit,
                 const std::vector<std::pair<std::string, std::string>>& extra,
                 const MapStorage& storage) {
  if (storage.kind == MapStorage::Kind::Quantised && (bitpix != FLOAT_IMG || !(storage.step > 0.0) ||
                                                     !std::isfinite(storage.step)))
    throw std::logic_error("write_image: quantised storage needs a float image and a positive step");
  if (nx < 1 || ny < 1) throw OutputError(path, "image has no pixels");
  std::vector<std::string> extra_cards;
  for (const auto& [k, v] : extra) {
    try {
      extra_cards.push_back(fits_card(k, v));
    } catch (const std::invalid_argument& e) {
      throw OutputError(path, e.what());
    }
  }
  AtomicOutput out(path);
  CfitsioGuard guard;
  fitsfile* f = nullptr;
  int status = 0;
  auto fail = [&](const std::string& what) {
    const std::string text = cfitsio_text(status);
    if (f) {
      int s = 0;
      fits_close_file(f, &s);
      fits_clear_errmsg();
      f = nullptr;
    }
    throw OutputError(path, what + ": " + text);
  };
  if (fits_create_diskfile(&f, out.temp_path().c_str(), &status)) {
    f = nullptr;
    fail("cannot create");
  }
  const bool compressed = storage.kind != MapStorage::Kind::Plain;
  if (compressed) {
    // The compressed image is an extension after an empty primary HDU (FITS
    // Standard 4.0 sec. 10.1); CFITSIO creates both from fits_create_img.
    if (set_compression(f, bitpix, nx, storage, status), status) fail("cannot set the compression");
  }
  long naxes[2] = {nx, ny};
  if (fits_create_img(f, bitpix, 2, naxes, &status)) fail("cannot write the header");
  const std::string& h = like.wcs_header;
  for (std::size_t i = 0; i + 80 <= h.size(); i += 80) {
    std::string card = h.substr(i, 80);
    const std::string key = trim(card.substr(0, 8));
    if (key.empty() || is_structural(key)) continue;
    if (fits_write_record(f, card.c_str(), &status)) fail("cannot write card " + key);
  }
  if (bunit) {
    const std::string card = fits_card("BUNIT", fits_string(*bunit));
    if (fits_update_card(f, "BUNIT", card.c_str(), &status)) fail("cannot write BUNIT");
  }
  for (std::size_t i = 0; i < extra_cards.size(); ++i) {
    const std::string& key = extra[i].first;
    if (fits_update_card(f, key.c_str(), extra_cards[i].c_str(), &status)) fail("cannot write card " + key);
  }
  static_assert(sizeof(float) == 4 && sizeof(std::int32_t) == 4);
  if (bitpix != FLOAT_IMG && bitpix != LONG_IMG) throw std::logic_error("write_image: only float32 and int32 images");
  const std::int64_t n = static_cast<std::int64_t>(nx) * ny;
  if (compressed) {
    // CFITSIO compresses tile by tile as it writes; AtomicOutput makes it durable.
    if (fits_write_img(f, bitpix == FLOAT_IMG ? TFLOAT : TINT, 1, static_cast<LONGLONG>(n), const_cast<void*>(data),
                       &status))
      fail("write failed");
    if (fits_close_file(f, &status)) {
      f = nullptr;
      fail("write failed");
    }
    f = nullptr;
    out.commit();
    return;
  }
  // CFITSIO writes the header; the data unit is written below (write_data_unit).
  LONGLONG head_start = 0, data_start = 0, data_end = 0;
  if (fits_flush_file(f, &status)) fail("write failed");
  if (fits_get_hduaddrll(f, &head_start, &data_start, &data_end, &status)) fail("write failed");
  if (fits_close_file(f, &status)) {
    f = nullptr;
    fail("write failed");
  }
  f = nullptr;
  write_data_unit(path, out.temp_path(), data_start, static_cast<const std::uint32_t*>(data), n);
  out.commit();
}

}  // namespace

void write_fits_image(const std::string& path, const ImageF& pixels, const SkyImage& like,
                      const std::string& bunit,
                      const std::vector<std::pair<std::string, std::string>>& extra_cards,
                      const MapStorage& storage) {
  write_image(path, FLOAT_IMG, pixels.data(), static_cast<long>(pixels.cols()),
              static_cast<long>(pixels.rows()), like, &bunit, extra_cards, storage);
}

void write_fits_labels(const std::string& path, const LabelsI32& labels, const SkyImage& like,
                       const std::vector<std::pair<std::string, std::string>>& extra_cards,
                       const MapStorage& storage) {
  static_assert(sizeof(int) == sizeof(std::int32_t), "TINT must be 32-bit");
  if (storage.kind == MapStorage::Kind::Quantised)
    throw std::logic_error("write_fits_labels: labels are stored plain or lossless");
  write_image(path, LONG_IMG, labels.data(), static_cast<long>(labels.cols()),
              static_cast<long>(labels.rows()), like, nullptr, extra_cards, storage);
}

}  // namespace skerry
