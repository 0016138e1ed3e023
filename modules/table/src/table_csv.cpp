// CSV encoding of a Table (RFC 4180 quoting; one header row) and the shared
// number formatting. See skerry/table_text.h for the contract.
#include <algorithm>
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
  out.reserve(out.size() + n * cols.size() * 12);
  for (std::size_t i = 0; i < n; ++i) {
    for (std::size_t j = 0; j < cols.size(); ++j) {
      if (j) out += ',';
      const Column& c = cols[j];
      switch (c.type) {
        case ColumnType::Float64: {
          std::string s = format_double(c.f64[i]);
          if (s.empty() && single) s = "\"\"";
          out += s;
          break;
        }
        case ColumnType::Int64: out += format_int(c.i64[i]); break;
        case ColumnType::Text: put_field(out, c.text[i], single); break;
      }
    }
    out += '\n';
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
        while (pos < n && (text[pos] == ' ' || text[pos] == '\t')) ++pos;
        if (pos < n && text[pos] != d && text[pos] != '\n' && text[pos] != '\r')
          throw TableParseError("line " + std::to_string(line) + ": unexpected character after a closing quote");
      } else {
        c.begin = pos;
        while (pos < n && text[pos] != d && text[pos] != '\n' && text[pos] != '\r') {
          if (text[pos] == '"')
            throw TableParseError("line " + std::to_string(line) +
                                  ": quote inside an unquoted field (quote the whole field and double inner quotes)");
          ++pos;
        }
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

  // Store cell boundaries column by column, then convert each column.
  std::vector<std::vector<Cell>> colcells(ncol);
  std::size_t nrows = 0;
  while (read_record(cells, rec_line)) {
    ++nrows;
    if (cells.size() != ncol)
      throw TableParseError("row " + std::to_string(nrows) + " (line " + std::to_string(rec_line) + ") has " +
                                std::to_string(cells.size()) + " fields, the header has " + std::to_string(ncol),
                            nrows);
    for (std::size_t j = 0; j < ncol; ++j) colcells[j].push_back(cells[j]);
  }

  std::unordered_set<std::string> must_num(opt.numeric_columns.begin(), opt.numeric_columns.end());
  for (const auto& m : opt.numeric_columns)
    if (std::find(names.begin(), names.end(), m) == names.end())
      throw TableParseError("missing column '" + shorten(m) + "'", 0, m);

  for (std::size_t j = 0; j < ncol; ++j) {
    const auto& cc = colcells[j];
    bool all_int = true, all_num = true, any_empty = false, any_value = false;
    std::size_t bad_row = 0;
    std::string bad_text;
    for (std::size_t i = 0; i < cc.size() && all_num; ++i) {
      std::string s = cell_text(text, cc[i]);
      std::string_view v = trim(s);
      if (v.empty()) {
        any_empty = true;
        continue;
      }
      any_value = true;
      std::int64_t iv;
      double dv;
      if (all_int && parse_int(v, iv)) continue;
      all_int = false;
      if (parse_double(v, dv)) continue;
      all_num = false;
      bad_row = i + 1;
      bad_text = std::string(v);
    }
    Column col;
    col.name = names[j];
    if (!all_num) {
      if (must_num.count(names[j]))
        throw TableParseError(where(bad_row, names[j]) + ": '" + shorten(bad_text) + "' is not a number", bad_row,
                              names[j]);
      col.type = ColumnType::Text;
      col.text.reserve(cc.size());
      for (const auto& c : cc) col.text.push_back(cell_text(text, c));
    } else if (all_int && any_value && !any_empty) {
      col.type = ColumnType::Int64;
      col.i64.reserve(cc.size());
      for (const auto& c : cc) {
        std::int64_t iv = 0;
        parse_int(cell_text(text, c), iv);
        col.i64.push_back(iv);
      }
    } else {
      col.type = ColumnType::Float64;
      col.f64.reserve(cc.size());
      for (const auto& c : cc) {
        std::string s = cell_text(text, c);
        double dv = std::nan("");
        if (!trim(s).empty()) parse_double(s, dv);
        col.f64.push_back(dv);
      }
    }
    t.add(std::move(col));
  }
  return t;
}

}  // namespace skerry
