// Catalogue tables in and out: CSV and VOTable through the text codecs of
// skerry/table_text.h, FITS binary tables through CFITSIO (Pence et al. 2010,
// A&A 524, A42; FITS Standard 4.0, sec. 7.3 binary tables).
//
// FITS layout written (FITS Standard 4.0 keywords plus a convention of ours):
//   HDU 1: empty primary array.
//   HDU 2: BINTABLE, EXTNAME = table name. Per column n:
//     TTYPEn  column name (its comment holds the start of the description)
//     TFORMn  1D (Float64, NaN = null), 1K (Int64), rA (Text, r = longest value, >= 1)
//     TUNITn  unit string when not empty
//     TUCDn   IVOA UCD (our convention; FITS has no standard keyword for it)
//     TDESCn  description (our convention; long values use the CONTINUE convention)
//   Table meta: one HIERARCH keyword per entry ("HIERARCH key = 'value'", long
//   values continued), keys restricted to printable ASCII without '=' and
//   values to printable ASCII (other bytes become '?') as FITS headers require.
// Reading accepts any BINTABLE or ASCII table (the first table HDU): scalar
// numeric columns (integers -> Int64, floats -> Float64, logical -> Int64 0/1,
// integer nulls -> Float64 NaN) and string columns; vector columns are skipped
// and listed in the meta entry "skipped_columns".
#include "io/table_io.h"

#include <fitsio.h>

#include <cmath>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <memory>
#include <sstream>
#include <string>
#include <vector>

#include "app/errors.h"
#include "io/atomic_file.h"
#include "io/fits_image.h"
#include "skerry/table_text.h"

namespace skerry {

namespace {

std::string lower_ending(const std::string& path) {
  std::string p = path;
  for (auto& c : p) c = static_cast<char>(std::tolower(static_cast<unsigned char>(c)));
  return p;
}

bool ends_with(const std::string& s, const std::string& e) { return s.size() >= e.size() && s.ends_with(e); }

std::string fits_status_text(int status) {
  char msg[FLEN_STATUS] = {0};
  fits_get_errstatus(status, msg);
  // Drain CFITSIO's message stack so later errors do not repeat stale text.
  char buf[FLEN_ERRMSG];
  std::string detail;
  while (fits_read_errmsg(buf)) {
    if (detail.empty()) detail = buf;
  }
  std::string s = msg;
  if (!detail.empty() && detail != s) s += " (" + detail + ")";
  return s;
}

std::string ascii_only(const std::string& s) {
  std::string o;
  o.reserve(s.size());
  for (char c : s) {
    unsigned char u = static_cast<unsigned char>(c);
    o += (u >= 0x20 && u < 0x7f) ? c : '?';
  }
  return o;
}

std::string hierarch_key(const std::string& k) {
  std::string o;
  for (char c : k) {
    unsigned char u = static_cast<unsigned char>(c);
    o += (u > 0x20 && u < 0x7f && c != '=' && c != '\'') ? c : '_';
  }
  if (o.empty()) o = "meta";
  if (o.size() > 60) o.resize(60);
  return o;
}

/// "HIERARCH key = 'value'" with the value split over CONTINUE cards (the long
/// string convention, HEASARC/OGIP 1.0) when it does not fit in 80 characters.
/// Quotes are doubled; a doubled quote is never split between cards.
std::vector<std::string> hierarch_cards(const std::string& key, const std::string& value) {
  std::vector<std::string> cards;
  std::string head = "HIERARCH " + key + " = '";
  std::size_t i = 0;
  bool first = true;
  do {
    std::string card = first ? head : "CONTINUE  '";
    first = false;
    // Room for the value, leaving 2 characters for "&'" (or "'").
    const std::size_t room = 80 - card.size() - 2;
    std::string chunk;
    while (i < value.size()) {
      std::size_t need = value[i] == '\'' ? 2 : 1;
      if (chunk.size() + need > room) break;
      chunk += value[i] == '\'' ? "''" : std::string(1, value[i]);
      ++i;
    }
    card += chunk;
    card += i < value.size() ? "&'" : "'";
    cards.push_back(card);
  } while (i < value.size());
  return cards;
}

/// Parse the quoted string value that starts at card[p] ("'...'" with doubled quotes).
std::string quoted_value(const std::string& card, std::size_t p) {
  std::string v;
  if (p >= card.size() || card[p] != '\'') return v;
  for (std::size_t k = p + 1; k < card.size(); ++k) {
    if (card[k] == '\'') {
      if (k + 1 < card.size() && card[k + 1] == '\'') {
        v += '\'';
        ++k;
        continue;
      }
      break;
    }
    v += card[k];
  }
  while (!v.empty() && v.back() == ' ') v.pop_back();
  return v;
}

std::string read_file(const std::string& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) throw InputError(path, std::string("cannot open: ") + std::strerror(errno));
  std::ostringstream ss;
  ss << in.rdbuf();
  if (in.bad()) throw InputError(path, "read error");
  return std::move(ss).str();
}

struct FitsCloser {
  void operator()(fitsfile* f) const {
    int st = 0;
    if (f) fits_close_file(f, &st);
  }
};
using FitsPtr = std::unique_ptr<fitsfile, FitsCloser>;

// ---- FITS writer -------------------------------------------------------------------

void write_fits_table(const Table& t, const std::string& path) {
  AtomicOutput out(path);
  int status = 0;
  fitsfile* raw = nullptr;
  initialise_cfitsio();
  fits_create_file(&raw, out.temp_path().c_str(), &status);
  if (status) throw OutputError(path, "cannot create FITS file: " + fits_status_text(status));
  FitsPtr f(raw);
  auto check = [&](const char* what) {
    if (status) throw OutputError(path, std::string(what) + ": " + fits_status_text(status));
  };
  fits_create_img(f.get(), 8, 0, nullptr, &status);
  check("cannot write the primary HDU");

  const auto& cols = t.columns();
  std::vector<std::string> ttype, tform, tunit;
  for (const auto& c : cols) {
    ttype.push_back(ascii_only(c.name));
    switch (c.type) {
      case ColumnType::Float64: tform.push_back("1D"); break;
      case ColumnType::Int64: tform.push_back("1K"); break;
      case ColumnType::Text: {
        std::size_t w = 1;
        for (const auto& s : c.text) w = std::max(w, s.size());
        tform.push_back(std::to_string(w) + "A");
        break;
      }
    }
    tunit.push_back(ascii_only(c.unit));
  }
  std::vector<char*> pt, pf, pu;
  for (std::size_t j = 0; j < cols.size(); ++j) {
    pt.push_back(ttype[j].data());
    pf.push_back(tform[j].data());
    pu.push_back(tunit[j].data());
  }
  std::string extname = ascii_only(t.name.empty() ? std::string("TABLE") : t.name);
  fits_create_tbl(f.get(), BINARY_TBL, static_cast<LONGLONG>(t.rows()), static_cast<int>(cols.size()), pt.data(),
                  pf.data(), pu.data(), extname.c_str(), &status);
  check("cannot create the binary table");
  for (std::size_t j = 0; j < cols.size(); ++j) {
    const auto& c = cols[j];
    const int n = static_cast<int>(j + 1);
    if (tunit[j].empty()) {
      std::string k = "TUNIT" + std::to_string(n);
      int st2 = 0;
      fits_delete_key(f.get(), k.c_str(), &st2);  // CFITSIO writes an empty TUNIT; drop it
    }
    if (!c.description.empty()) {
      std::string k = "TTYPE" + std::to_string(n);
      std::string cm = ascii_only(c.description).substr(0, 47);
      fits_modify_comment(f.get(), k.c_str(), cm.c_str(), &status);
      std::string kd = "TDESC" + std::to_string(n);
      std::string d = ascii_only(c.description);
      fits_write_key_longstr(f.get(), kd.c_str(), d.c_str(), "column description", &status);
    }
    if (!c.ucd.empty()) {
      std::string k = "TUCD" + std::to_string(n);
      std::string u = ascii_only(c.ucd);
      fits_write_key_longstr(f.get(), k.c_str(), u.c_str(), "IVOA UCD of the column", &status);
    }
    check("cannot write column keywords");
  }
  for (const auto& [k, v] : t.meta) {
    // Cards are composed here because CFITSIO upper-cases HIERARCH names.
    for (const auto& card : hierarch_cards(hierarch_key(k), ascii_only(v))) {
      fits_write_record(f.get(), card.c_str(), &status);
      check("cannot write table metadata");
    }
  }
  if (!t.meta.empty()) {
    fits_write_key_longwarn(f.get(), &status);
    check("cannot write table metadata");
  }

  const LONGLONG nrows = static_cast<LONGLONG>(t.rows());
  for (std::size_t j = 0; j < cols.size() && nrows > 0; ++j) {
    const auto& c = cols[j];
    const int n = static_cast<int>(j + 1);
    switch (c.type) {
      case ColumnType::Float64:
        fits_write_col(f.get(), TDOUBLE, n, 1, 1, nrows, const_cast<double*>(c.f64.data()), &status);
        break;
      case ColumnType::Int64: {
        std::vector<LONGLONG> v(c.i64.begin(), c.i64.end());
        fits_write_col(f.get(), TLONGLONG, n, 1, 1, nrows, v.data(), &status);
        break;
      }
      case ColumnType::Text: {
        std::vector<std::string> s;
        s.reserve(c.text.size());
        for (const auto& x : c.text) {
          std::string a = ascii_only(x);
          s.push_back(a);
        }
        std::vector<char*> p;
        for (auto& x : s) p.push_back(x.data());
        fits_write_col_str(f.get(), n, 1, 1, nrows, p.data(), &status);
        break;
      }
    }
    check("cannot write column data");
  }
  // Checksums (FITS Standard 4.0 Appendix J / Seaman et al. checksum convention,
  // REF-FITS-02). CFITSIO's fits_write_chksum puts the current time into the
  // comments of DATASUM and CHECKSUM, so two runs would differ in bytes; the
  // comments are made fixed and CHECKSUM is recomputed over the final header
  // (set to '0000000000000000', sum, store the ones' complement encoded).
  fits_write_chksum(f.get(), &status);
  fits_modify_comment(f.get(), "DATASUM", "data unit checksum", &status);
  fits_modify_key_str(f.get(), "CHECKSUM", "0000000000000000", "HDU checksum", &status);
  {
    unsigned long datasum = 0, hdusum = 0;
    char ascii[17] = {0};
    fits_get_chksum(f.get(), &datasum, &hdusum, &status);
    fits_encode_chksum(hdusum, 1, ascii);
    fits_modify_key_str(f.get(), "CHECKSUM", ascii, "HDU checksum", &status);
  }
  check("cannot write checksums");
  fits_close_file(f.release(), &status);
  if (status) throw OutputError(path, "cannot close FITS file: " + fits_status_text(status));
  out.commit();
}

// ---- FITS reader ----------------------------------------------------------------------

std::string read_str_key(fitsfile* f, const std::string& key) {
  int st = 0;
  char* longv = nullptr;
  fits_read_key_longstr(f, key.c_str(), &longv, nullptr, &st);
  std::string v;
  if (st == 0 && longv) v = longv;
  if (longv) fits_free_memory(longv, &st);
  fits_clear_errmsg();
  return v;
}

Table read_fits_table(const std::string& path) {
  int status = 0;
  fitsfile* raw = nullptr;
  initialise_cfitsio();
  check_fits_header_text(path);
  fits_open_table(&raw, path.c_str(), READONLY, &status);
  if (status) {
    std::string why = fits_status_text(status);
    // CFITSIO 4.2 leaves the handle allocated when the file opens but has no
    // table HDU (LeakSanitizer, fuzz_fits_table): close it.
    if (raw) {
      int st = 0;
      fits_close_file(raw, &st);
    }
    throw InputError(path, "cannot open a FITS table: " + why);
  }
  FitsPtr f(raw);
  auto check = [&](const std::string& what) {
    if (status) throw InputError(path, what + ": " + fits_status_text(status));
  };
  int ncols = 0;
  LONGLONG nrows = 0;
  fits_get_num_cols(f.get(), &ncols, &status);
  fits_get_num_rowsll(f.get(), &nrows, &status);
  check("cannot read the table size");
  {
    // A header may claim more rows than the file holds: refuse before allocating.
    LONGLONG naxis1 = 0;
    int st = 0;
    fits_read_key(f.get(), TLONGLONG, "NAXIS1", &naxis1, nullptr, &st);
    fits_clear_errmsg();
    std::error_code ec;
    const auto fsize = std::filesystem::file_size(path, ec);
    if (!ec && naxis1 > 0 && nrows > 0 &&
        (static_cast<long double>(naxis1) * static_cast<long double>(nrows) > static_cast<long double>(fsize)))
      throw InputError(path, "the table header claims " + std::to_string(nrows) + " rows of " +
                                 std::to_string(naxis1) + " bytes, more than the file holds (truncated file?)");
  }
  Table t;
  t.name = read_str_key(f.get(), "EXTNAME");
  std::string skipped;
  for (int n = 1; n <= ncols; ++n) {
    int typecode = 0;
    long repeat = 0, width = 0;
    fits_get_coltype(f.get(), n, &typecode, &repeat, &width, &status);
    check("column " + std::to_string(n) + ": cannot read its type");
    Column c;
    c.name = read_str_key(f.get(), "TTYPE" + std::to_string(n));
    if (c.name.empty()) c.name = "col" + std::to_string(n);
    c.unit = read_str_key(f.get(), "TUNIT" + std::to_string(n));
    c.ucd = read_str_key(f.get(), "TUCD" + std::to_string(n));
    c.description = read_str_key(f.get(), "TDESC" + std::to_string(n));
    if (t.find(c.name)) throw InputError(path, "duplicate column name '" + c.name + "'");
    const int at = std::abs(typecode);
    const bool vector_col = typecode < 0 || (at != TSTRING && repeat != 1);
    if (vector_col) {
      skipped += (skipped.empty() ? "" : ",") + c.name;
      continue;
    }
    if (nrows > 0x7fffffffLL * 16) throw InputError(path, "table too large");
    const auto nr = static_cast<std::size_t>(nrows);
    int anynul = 0;
    if (at == TSTRING) {
      c.type = ColumnType::Text;
      std::vector<std::string> buf(nr, std::string(static_cast<std::size_t>(std::max<long>(width, 1)) + 1, '\0'));
      std::vector<char*> p;
      p.reserve(nr);
      for (auto& b : buf) p.push_back(b.data());
      char nul[] = "";
      if (nr) fits_read_col_str(f.get(), n, 1, 1, nrows, nul, p.data(), &anynul, &status);
      check("column '" + c.name + "': cannot read");
      c.text.reserve(nr);
      // Trailing blanks are padding in FITS character fields (FITS Standard 4.0, sec. 7.3.3.1).
      for (auto& b : buf) {
        std::string v = b.c_str();
        while (!v.empty() && v.back() == ' ') v.pop_back();
        c.text.push_back(std::move(v));
      }
    } else if (at == TFLOAT || at == TDOUBLE || at == TCOMPLEX || at == TDBLCOMPLEX) {
      if (at == TCOMPLEX || at == TDBLCOMPLEX) {
        skipped += (skipped.empty() ? "" : ",") + c.name;
        continue;
      }
      c.type = ColumnType::Float64;
      c.f64.resize(nr);
      double nulv = std::nan("");
      if (nr) fits_read_col(f.get(), TDOUBLE, n, 1, 1, nrows, &nulv, c.f64.data(), &anynul, &status);
      check("column '" + c.name + "': cannot read");
    } else if (at == TLOGICAL) {
      c.type = ColumnType::Int64;
      std::vector<char> v(nr);
      char nulv = 0;
      if (nr) fits_read_col(f.get(), TLOGICAL, n, 1, 1, nrows, &nulv, v.data(), &anynul, &status);
      check("column '" + c.name + "': cannot read");
      c.i64.assign(v.begin(), v.end());
    } else if (at == TBIT) {
      skipped += (skipped.empty() ? "" : ",") + c.name;
      continue;
    } else {
      // Integer types. Nulls (TNULLn) -> Float64 NaN.
      std::vector<LONGLONG> v(nr);
      std::vector<char> nul(nr, 0);
      if (nr) fits_read_colnull(f.get(), TLONGLONG, n, 1, 1, nrows, v.data(), nul.data(), &anynul, &status);
      check("column '" + c.name + "': cannot read");
      // Scaled integers (TSCALn/TZEROn other than the unsigned offsets) are physical floats.
      double scale = 1.0, zero = 0.0;
      {
        int st = 0;
        fits_read_key(f.get(), TDOUBLE, ("TSCAL" + std::to_string(n)).c_str(), &scale, nullptr, &st);
        st = 0;
        fits_read_key(f.get(), TDOUBLE, ("TZERO" + std::to_string(n)).c_str(), &zero, nullptr, &st);
        fits_clear_errmsg();
      }
      bool unsigned_offset = scale == 1.0 && (zero == 0.0 || zero == 32768.0 || zero == 2147483648.0 ||
                                              zero == 9223372036854775808.0 || zero == -128.0);
      if (anynul || !unsigned_offset) {
        c.type = ColumnType::Float64;
        c.f64.resize(nr);
        double nulv = std::nan("");
        fits_read_col(f.get(), TDOUBLE, n, 1, 1, nrows, &nulv, c.f64.data(), &anynul, &status);
        check("column '" + c.name + "': cannot read");
      } else {
        c.type = ColumnType::Int64;
        c.i64.assign(v.begin(), v.end());
      }
    }
    t.add(std::move(c));
  }
  // Meta: HIERARCH keywords (what write_fits_table writes).
  int nkeys = 0, more = 0;
  fits_get_hdrspace(f.get(), &nkeys, &more, &status);
  check("cannot read the header");
  std::vector<std::string> cards;
  for (int k = 1; k <= nkeys; ++k) {
    char card[FLEN_CARD] = {0};
    fits_read_record(f.get(), k, card, &status);
    check("cannot read the header");
    cards.emplace_back(card);
  }
  for (std::size_t k = 0; k < cards.size(); ++k) {
    const std::string& card = cards[k];
    if (card.rfind("HIERARCH ", 0) != 0) continue;
    std::size_t eq = card.find('=', 9);
    if (eq == std::string::npos) continue;
    std::string key = card.substr(9, eq - 9);
    while (!key.empty() && key.back() == ' ') key.pop_back();
    std::size_t q = card.find_first_not_of(' ', eq + 1);
    if (q == std::string::npos || card[q] != '\'') continue;  // only string values are meta
    std::string v = quoted_value(card, q);
    while (!v.empty() && v.back() == '&' && k + 1 < cards.size() && cards[k + 1].rfind("CONTINUE", 0) == 0) {
      v.pop_back();
      ++k;
      std::size_t q2 = cards[k].find('\'', 8);
      if (q2 == std::string::npos) break;
      v += quoted_value(cards[k], q2);
    }
    t.set_meta(key, v);
  }
  if (!skipped.empty()) t.set_meta("skipped_columns", skipped);
  return t;
}

}  // namespace

TableFormat table_format_from_name(const std::string& path) {
  std::string p = lower_ending(path);
  if (ends_with(p, ".csv")) return TableFormat::Csv;
  if (ends_with(p, ".ecsv")) return TableFormat::Ecsv;
  if (ends_with(p, ".fits") || ends_with(p, ".fit") || ends_with(p, ".fts")) return TableFormat::Fits;
  if (ends_with(p, ".vot") || ends_with(p, ".xml") || ends_with(p, ".votable")) return TableFormat::VOTable;
  throw UsageError(path + ": unknown table format (expected a name ending in .csv, .ecsv, .fits, .fit, .vot or .xml)");
}

namespace {
/// "FILE[SEL]" -> (FILE, SEL) when FILE itself is not a file of that whole name.
std::pair<std::string, std::string> split_table_selection(const std::string& path_with_selection) {
  std::string path = path_with_selection, selection;
  if (!path.empty() && path.back() == ']' && !std::filesystem::exists(path)) {
    const std::size_t open = path.rfind('[');
    if (open != std::string::npos && open > 0) {
      selection = path.substr(open + 1, path.size() - open - 2);
      path.resize(open);
    }
  }
  return {path, selection};
}
}  // namespace

std::string table_file_path(const std::string& path_with_selection) {
  return split_table_selection(path_with_selection).first;
}

Table read_table(const std::string& path_with_selection) {
  // "FILE[SEL]" chooses one TABLE of a VOTable (SEL: 0-based index or name).
  const auto [path, selection] = split_table_selection(path_with_selection);
  const TableFormat fmt = table_format_from_name(path);
  if (!selection.empty() && fmt != TableFormat::VOTable)
    throw UsageError(path_with_selection + ": a table selection [" + selection +
                     "] applies to VOTable files (several TABLEs); this file holds one table");
  if (fmt == TableFormat::Fits) return read_fits_table(path);
  std::string text = read_file(path);
  try {
    VotableReadOptions vo;
    vo.table = selection;
    Table t = fmt == TableFormat::Csv    ? parse_csv(text)
              : fmt == TableFormat::Ecsv ? parse_ecsv(text)
                                         : parse_votable(text, vo);
    if (t.name.empty()) {
      std::string base = path.substr(path.find_last_of('/') == std::string::npos ? 0 : path.find_last_of('/') + 1);
      t.name = base.substr(0, base.find('.'));
    }
    return t;
  } catch (const std::invalid_argument& e) {
    throw InputError(path, e.what());
  }
}

void write_table(const Table& table, const std::string& path) {
  const TableFormat fmt = table_format_from_name(path);
  switch (fmt) {
    case TableFormat::Csv: write_text_atomic(path, format_csv(table)); break;
    case TableFormat::VOTable: write_text_atomic(path, format_votable(table)); break;
    case TableFormat::Ecsv: throw UsageError(path + ": ECSV is read, not written (write .csv, .fits or .vot)");
    case TableFormat::Fits: write_fits_table(table, path); break;
  }
}

}  // namespace skerry
