// CSV encoding of a Table (RFC 4180 quoting; one header row) and the shared
// number formatting. See skerry/table_text.h for the contract.
#include <oneapi/tbb/parallel_for.h>

#include <algorithm>
#include <array>
#include <charconv>
#include <cmath>
#include <cstdint>
#include <string>
#include <string_view>
#include <unordered_set>
#include <vector>

#include "skerry/table_text.h"
#include "table_text_internal.h"

namespace skerry {

// ---- numbers -------------------------------------------------------------------

std::string format_double(double v) {
  if (std::isnan(v)) return {};
  if (std::isinf(v)) return v > 0 ? "inf" : "-inf";
  char buf[64];
  // Shortest representation that reads back to the same double (C++17 to_chars).
  auto r = std::to_chars(buf, buf + sizeof buf, v);
  std::string s(buf, r.ptr);
  // Keep the Float64 type visible on re-reading: "3" -> "3.0".
  if (s.find_first_not_of("-0123456789") == std::string::npos) s += ".0";
  return s;
}

namespace table_detail {

std::string format_int(std::int64_t v) {
  char buf[32];
  auto r = std::to_chars(buf, buf + sizeof buf, v);
  return std::string(buf, r.ptr);
}

std::string_view trim(std::string_view s) {
  std::size_t b = 0, e = s.size();
  while (b < e && (s[b] == ' ' || s[b] == '\t' || s[b] == '\r' || s[b] == '\n')) ++b;
  while (e > b && (s[e - 1] == ' ' || s[e - 1] == '\t' || s[e - 1] == '\r' || s[e - 1] == '\n')) --e;
  return s.substr(b, e - b);
}

bool parse_int(std::string_view s, std::int64_t& out) {
  s = trim(s);
  if (s.empty()) return false;
  if (s.front() == '+') {
    s.remove_prefix(1);
    if (s.empty() || s.front() == '-' || s.front() == '+') return false;
  }
  auto r = std::from_chars(s.data(), s.data() + s.size(), out);
  return r.ec == std::errc() && r.ptr == s.data() + s.size();
}

bool parse_double(std::string_view s, double& out) {
  s = trim(s);
  if (s.empty()) return false;
  if (s.front() == '+') {
    s.remove_prefix(1);
    if (s.empty() || s.front() == '-' || s.front() == '+') return false;
  }
  auto r = std::from_chars(s.data(), s.data() + s.size(), out, std::chars_format::general);
  if (r.ec == std::errc::result_out_of_range) {
    // Over- or underflow: from_chars leaves `out` untouched; decide by the text.
    bool neg = s.front() == '-';
    // An exponent with a minus sign after 'e' means underflow.
    auto epos = s.find_first_of("eE");
    bool under = epos != std::string_view::npos && epos + 1 < s.size() && s[epos + 1] == '-';
    out = under ? (neg ? -0.0 : 0.0) : (neg ? -HUGE_VAL : HUGE_VAL);
    return r.ptr == s.data() + s.size();
  }
  return r.ec == std::errc() && r.ptr == s.data() + s.size();
}

std::string shorten(std::string_view s) {
  std::string o;
  for (char c : s.substr(0, 40)) o += (static_cast<unsigned char>(c) < 0x20 || c == 0x7f) ? '?' : c;
  if (s.size() > 40) o += "...";
  return o;
}

std::string where(std::size_t row, const std::string& column) {
  std::string w;
  if (row) w = "row " + std::to_string(row);
  if (!column.empty()) w += (w.empty() ? "" : ", ") + std::string("column '") + shorten(column) + "'";
  return w;
}

}  // namespace table_detail

using namespace table_detail;

// ---- CSV writer -------------------------------------------------------------------

namespace {

void put_field(std::string& out, std::string_view f, bool single_column) {
  bool need = f.empty() ? single_column : false;
  if (!need && !f.empty()) {
    // A leading UTF-8 byte-order mark is quoted: unquoted at the start of the
    // output the reader would strip it as the file's BOM (found by fuzz_csv).
    need = f.front() == ' ' || f.front() == '\t' || f.back() == ' ' || f.back() == '\t' || f.front() == '#' ||
           f.substr(0, 3) == "\xEF\xBB\xBF";
    if (!need)
      for (char c : f)
        if (c == ',' || c == '"' || c == '\n' || c == '\r') {
          need = true;
          break;
        }
  }
  if (!need) {
    out.append(f);
    return;
  }
  out += '"';
  for (char c : f) {
    if (c == '"') out += '"';
    out += c;
  }
  out += '"';
}

/// format_double(v) for a finite v, appended without a temporary string.
void append_finite_double(std::string& out, double v) {
  char buf[40];
  const auto r = std::to_chars(buf, buf + sizeof buf - 2, v);
  char* end = r.ptr;
  bool integral = true;  // only "-" and digits: add ".0", as format_double does
  for (const char* p = buf; p != end && integral; ++p) integral = (*p == '-' || (*p >= '0' && *p <= '9'));
  if (integral) {
    *end++ = '.';
    *end++ = '0';
  }
  out.append(buf, end);
}

}  // namespace

namespace {

/// Rows [begin, end) of `t` as CSV lines, appended to `out`.
void append_csv_rows(std::string& out, const Table& t, std::size_t begin, std::size_t end, bool single) {
  const auto& cols = t.columns();
  for (std::size_t i = begin; i < end; ++i) {
    for (std::size_t j = 0; j < cols.size(); ++j) {
      if (j) out += ',';
      const Column& c = cols[j];
      switch (c.type) {
        case ColumnType::Float64: {
          const double v = c.f64[i];
          if (std::isfinite(v)) {
            append_finite_double(out, v);
          } else {
            const std::string s = format_double(v);
            out += (s.empty() && single) ? std::string("\"\"") : s;
          }
          break;
        }
        case ColumnType::Int64: {
          char buf[32];
          const auto r = std::to_chars(buf, buf + sizeof buf, c.i64[i]);
          out.append(buf, r.ptr);
          break;
        }
        case ColumnType::Text: put_field(out, c.text[i], single); break;
      }
    }
    out += '\n';
  }
}

}  // namespace

std::string format_csv(const Table& t) {
  t.check_consistent();
  std::string out;
  const auto& cols = t.columns();
  const bool single = cols.size() == 1;
  for (std::size_t j = 0; j < cols.size(); ++j) {
    if (j) out += ',';
    put_field(out, cols[j].name, single);
  }
  out += '\n';
  const std::size_t n = t.rows();
  // Blocks of rows are formatted in parallel and joined in row order: the bytes
  // are those of one sequential pass.
  constexpr std::size_t kBlock = 8192;
  const std::size_t nblocks = (n + kBlock - 1) / kBlock;
  std::vector<std::string> blocks(nblocks);
  oneapi::tbb::parallel_for(std::size_t{0}, nblocks, [&](std::size_t k) {
    blocks[k].reserve(kBlock * cols.size() * 12);
    append_csv_rows(blocks[k], t, k * kBlock, std::min(n, (k + 1) * kBlock), single);
  });
  std::size_t total = out.size();
  for (const auto& b : blocks) total += b.size();
  out.reserve(total);
  for (auto& b : blocks) {
    out += b;
    std::string().swap(b);
  }
  return out;
}

// ---- CSV reader ---------------------------------------------------------------------

namespace {

struct Cell {
  std::size_t begin = 0;   // offset of the content (inside the quotes when quoted)
  std::size_t len = 0;
  bool quoted = false;     // content may hold doubled quotes
};

/// The cell's content; a quoted cell is unescaped into `scratch`.
std::string_view cell_view(std::string_view text, const Cell& c, std::string& scratch) {
  std::string_view v = text.substr(c.begin, c.len);
  if (!c.quoted) return v;
  scratch.clear();
  for (std::size_t k = 0; k < v.size(); ++k) {
    scratch += v[k];
    if (v[k] == '"') ++k;  // doubled quote
  }
  return scratch;
}

std::string cell_text(std::string_view text, const Cell& c) {
  std::string_view v = text.substr(c.begin, c.len);
  if (!c.quoted) return std::string(v);
  std::string s;
  s.reserve(v.size());
  for (std::size_t k = 0; k < v.size(); ++k) {
    s += v[k];
    if (v[k] == '"') ++k;  // doubled quote
  }
  return s;
}

}  // namespace

Table parse_csv(std::string_view text, const CsvReadOptions& opt) {
  const char d = opt.delimiter;
  if (d == '"' || d == '\n' || d == '\r')
    throw TableParseError("CSV delimiter may not be a quote or a line break");
  std::size_t pos = 0;
  if (text.substr(0, 3) == "\xEF\xBB\xBF") pos = 3;  // UTF-8 byte-order mark
  const std::size_t n = text.size();

  // Characters that end an unquoted field (or are an error inside one).
  std::array<bool, 256> stop{};
  for (char c : {d, '\n', '\r', '"'}) stop[static_cast<unsigned char>(c)] = true;

  // Tokeniser: reads one record starting at pos; returns false at end of text.
  // Blank lines (no characters at all) are skipped.
  std::size_t line = 1;
  auto read_record = [&](std::vector<Cell>& cells, std::size_t& record_line) -> bool {
    cells.clear();
    while (pos < n && (text[pos] == '\n' || text[pos] == '\r')) {
      if (text[pos] == '\n') ++line;
      ++pos;
    }
    if (pos >= n) return false;
    record_line = line;
    while (true) {
      Cell c;
      if (pos < n && text[pos] == '"') {
        ++pos;
        c.quoted = true;
        c.begin = pos;
        while (true) {
          if (pos >= n)
            throw TableParseError("line " + std::to_string(record_line) + ": quoted field is not closed");
          if (text[pos] == '"') {
            if (pos + 1 < n && text[pos + 1] == '"') {
              pos += 2;
              continue;
            }
            break;
          }
          if (text[pos] == '\n') ++line;
          ++pos;
        }
        c.len = pos - c.begin;
        ++pos;  // closing quote
        // Only blanks may follow a closing quote before the delimiter.
        // (A blank that is itself the delimiter, as in space-separated ECSV, ends the field.)
        while (pos < n && text[pos] != d && (text[pos] == ' ' || text[pos] == '\t')) ++pos;
        if (pos < n && text[pos] != d && text[pos] != '\n' && text[pos] != '\r')
          throw TableParseError("line " + std::to_string(line) + ": unexpected character after a closing quote");
      } else {
        c.begin = pos;
        while (pos < n && !stop[static_cast<unsigned char>(text[pos])]) ++pos;
        if (pos < n && text[pos] == '"')
          throw TableParseError("line " + std::to_string(line) +
                                ": quote inside an unquoted field (quote the whole field and double inner quotes)");
        c.len = pos - c.begin;
      }
      cells.push_back(c);
      if (pos >= n) return true;
      if (text[pos] == d) {
        ++pos;
        continue;
      }
      // end of line: \n, \r\n or a lone \r
      if (text[pos] == '\r') ++pos;
      if (pos < n && text[pos] == '\n') ++pos;
      ++line;
      return true;
    }
  };

  // Comment lines before the header.
  if (opt.comment) {
    while (true) {
      while (pos < n && (text[pos] == '\n' || text[pos] == '\r')) {
        if (text[pos] == '\n') ++line;
        ++pos;
      }
      if (pos < n && text[pos] == opt.comment) {
        while (pos < n && text[pos] != '\n') ++pos;
        continue;
      }
      break;
    }
  }

  std::vector<Cell> cells;
  std::size_t rec_line = 0;
  if (!read_record(cells, rec_line)) throw TableParseError("no header row (empty CSV)");
  Table t;
  const std::size_t ncol = cells.size();
  std::vector<std::string> names;
  {
    std::unordered_set<std::string> seen;
    for (std::size_t j = 0; j < ncol; ++j) {
      std::string nm = std::string(trim(cell_text(text, cells[j])));
      if (nm.empty()) throw TableParseError("header: column " + std::to_string(j + 1) + " has no name");
      if (!seen.insert(nm).second) throw TableParseError("header: duplicate column name '" + shorten(nm) + "'");
      names.push_back(std::move(nm));
    }
  }

  // Each cell is converted while its row is being read (its text is then in the
  // cache), by a small state per column: parsed as an integer while every cell so
  // far was one, as a double from then on, and not at all once a cell is not a
  // number (the column is then text, taken from the cell boundaries kept here).
  // A cell read as an integer also keeps (double)x, which is the double its text
  // reads as (both are rounded to nearest), so the column can still turn out to
  // be Float64 without a second pass.
  struct ColumnState {
    bool all_int = true, all_num = true, any_empty = false, any_value = false;
    std::size_t bad_row = 0;
    std::string bad_text;
    std::vector<std::int64_t> iv;
    std::vector<double> dv;
    std::vector<Cell> cells;
  };
  std::vector<ColumnState> cs(ncol);
  {
    // Line count: an upper bound on the rows (quoted line breaks aside), to size the columns once.
    const auto lines =
        static_cast<std::size_t>(std::count(text.begin() + static_cast<std::ptrdiff_t>(pos), text.end(), '\n')) + 1;
    for (auto& c : cs) {
      c.cells.reserve(lines);
      c.dv.reserve(lines);
    }
  }
  std::string scratch;
  std::size_t nrows = 0;
  while (read_record(cells, rec_line)) {
    ++nrows;
    if (cells.size() != ncol)
      throw TableParseError("row " + std::to_string(nrows) + " (line " + std::to_string(rec_line) + ") has " +
                                std::to_string(cells.size()) + " fields, the header has " + std::to_string(ncol),
                            nrows);
    for (std::size_t j = 0; j < ncol; ++j) {
      ColumnState& c = cs[j];
      c.cells.push_back(cells[j]);
      if (!c.all_num) continue;
      const std::string_view v = trim(cell_view(text, cells[j], scratch));
      double value = std::nan("");
      if (v.empty()) {
        c.any_empty = true;
      } else {
        c.any_value = true;
        std::int64_t x;
        if (c.all_int && parse_int(v, x)) {
          c.iv.push_back(x);
          value = (x == 0 && v.front() == '-') ? -0.0 : static_cast<double>(x);
        } else {
          c.all_int = false;
          if (!parse_double(v, value)) {
            c.all_num = false;
            c.bad_row = nrows;
            c.bad_text = std::string(v);
            continue;
          }
        }
      }
      c.dv.push_back(value);
    }
  }

  std::unordered_set<std::string> must_num(opt.numeric_columns.begin(), opt.numeric_columns.end());
  std::unordered_set<std::string> must_text(opt.text_columns.begin(), opt.text_columns.end());
  for (const auto& m : opt.numeric_columns)
    if (std::find(names.begin(), names.end(), m) == names.end())
      throw TableParseError("missing column '" + shorten(m) + "'", 0, m);

  for (std::size_t j = 0; j < ncol; ++j) {
    ColumnState& st = cs[j];
    const auto& cc = st.cells;
    const std::size_t m = cc.size();
    const bool all_num = st.all_num, all_int = st.all_int, any_value = st.any_value, any_empty = st.any_empty;
    const std::size_t bad_row = st.bad_row;
    const std::string& bad_text = st.bad_text;
    std::vector<std::int64_t>& iv = st.iv;
    std::vector<double>& dv = st.dv;
    Column col;
    col.name = names[j];
    if (!all_num || must_text.count(names[j])) {
      if (must_num.count(names[j]) && !all_num)
        throw TableParseError(where(bad_row, names[j]) + ": '" + shorten(bad_text) + "' is not a number", bad_row,
                              names[j]);
      col.type = ColumnType::Text;
      col.text.reserve(m);
      for (const auto& c : cc) col.text.push_back(cell_text(text, c));
    } else if (all_int && any_value && !any_empty) {
      col.type = ColumnType::Int64;
      col.i64 = std::move(iv);
    } else {
      col.type = ColumnType::Float64;
      col.f64 = std::move(dv);
    }
    st = ColumnState{};  // this column's cells and buffers are no longer needed
    t.add(std::move(col));
  }
  return t;
}

}  // namespace skerry
