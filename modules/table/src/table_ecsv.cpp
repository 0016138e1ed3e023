// ECSV 1.0 reader (Enhanced Character Separated Values; the format specification
// of the astropy project, APE 6: Aldcroft 2015, "ECSV: Enhanced Character
// Separated Values", docs/REFERENCES.md REF-ECSV). An ECSV file is
//
//   # %ECSV 1.0
//   # ---
//   # delimiter: ','                       (optional; default a single space)
//   # datatype:
//   # - {name: ra_deg, unit: deg, datatype: float64, description: ...}
//   # - name: flags                         (block style is allowed too)
//   #   datatype: int64
//   # meta: {survey: X}                    (optional)
//   # schema: astropy-2.0                  (optional)
//   ra_deg,flags                           (the header row: the column names again)
//   201.25,0
//
// The YAML header is read by a small parser for the subset ECSV writers use:
// the top-level keys above, a list of column maps in flow ({...}) or block
// style, plain, single- and double-quoted scalars. The data rows are CSV with the
// declared delimiter (parse_csv); their types are then checked against the
// declared datatypes.
#include <cmath>
#include <cstdint>
#include <string>
#include <string_view>
#include <vector>

#include "skerry/table_text.h"
#include "table_text_internal.h"

namespace skerry {

using namespace table_detail;

namespace {

[[noreturn]] void fail(const std::string& why) { throw TableParseError("ECSV header: " + why); }

struct EcsvColumn {
  std::string name, datatype, unit, description;
};

/// A YAML scalar: 'single' (with '' for a quote), "double" (with \" \\ \n \t),
/// or plain (trimmed).
std::string scalar(std::string_view v) {
  v = trim(v);
  if (v.size() >= 2 && v.front() == '\'' && v.back() == '\'') {
    std::string out;
    for (std::size_t i = 1; i + 1 < v.size(); ++i) {
      out.push_back(v[i]);
      if (v[i] == '\'' && i + 2 < v.size() && v[i + 1] == '\'') ++i;
    }
    return out;
  }
  if (v.size() >= 2 && v.front() == '"' && v.back() == '"') {
    std::string out;
    for (std::size_t i = 1; i + 1 < v.size(); ++i) {
      if (v[i] == '\\' && i + 2 < v.size()) {
        const char e = v[++i];
        out.push_back(e == 'n' ? '\n' : e == 't' ? '\t' : e);
      } else {
        out.push_back(v[i]);
      }
    }
    return out;
  }
  return std::string(v);
}

/// Split a flow mapping's inside "k: v, k: v" at top-level commas (commas inside
/// quotes, brackets or braces stay).
std::vector<std::string_view> split_flow(std::string_view s) {
  std::vector<std::string_view> parts;
  int depth = 0;
  char quote = 0;
  std::size_t start = 0;
  for (std::size_t i = 0; i < s.size(); ++i) {
    const char c = s[i];
    if (quote) {
      if (c == quote) quote = 0;
    } else if (c == '\'' || c == '"') {
      quote = c;
    } else if (c == '{' || c == '[') {
      ++depth;
    } else if (c == '}' || c == ']') {
      --depth;
    } else if (c == ',' && depth == 0) {
      parts.push_back(s.substr(start, i - start));
      start = i + 1;
    }
  }
  if (quote) fail("unterminated quoted string in '" + shorten(s) + "'");
  parts.push_back(s.substr(start));
  return parts;
}

/// "key: value" -> (key, value); the value may be empty.
bool key_value(std::string_view line, std::string& key, std::string_view& value) {
  const std::size_t colon = line.find(": ");
  const bool at_end = !line.empty() && line.back() == ':';
  if (colon == std::string_view::npos && !at_end) return false;
  const std::size_t c = colon == std::string_view::npos ? line.size() - 1 : colon;
  key = std::string(trim(line.substr(0, c)));
  value = c + 1 < line.size() ? trim(line.substr(c + 1)) : std::string_view();
  return !key.empty();
}

void set_column_key(EcsvColumn& col, const std::string& key, std::string_view value) {
  if (key == "name") col.name = scalar(value);
  else if (key == "datatype") col.datatype = scalar(value);
  else if (key == "unit") col.unit = scalar(value);
  else if (key == "description") col.description = scalar(value);
  // format, subtype, meta: not used
}

std::size_t indent_of(std::string_view s) {
  std::size_t k = 0;
  while (k < s.size() && s[k] == ' ') ++k;
  return k;
}

bool is_float_type(const std::string& d) { return d == "float16" || d == "float32" || d == "float64"; }
bool is_int_type(const std::string& d) {
  return d == "int8" || d == "int16" || d == "int32" || d == "int64" || d == "uint8" || d == "uint16" ||
         d == "uint32" || d == "uint64";
}

}  // namespace

Table parse_ecsv(std::string_view text) {
  if (text.substr(0, 3) == "\xEF\xBB\xBF") text.remove_prefix(3);
  // Header lines: every leading line that starts with '#'.
  std::vector<std::string_view> header;
  std::size_t pos = 0;
  while (pos < text.size() && text[pos] == '#') {
    std::size_t e = text.find('\n', pos);
    if (e == std::string_view::npos) e = text.size();
    std::string_view l = text.substr(pos, e - pos);
    if (!l.empty() && l.back() == '\r') l.remove_suffix(1);
    header.push_back(l);
    pos = e < text.size() ? e + 1 : e;
  }
  if (header.empty() || header.front().substr(0, 7) != "# %ECSV")
    fail("the file does not start with '# %ECSV' (not an ECSV file)");
  const std::string version(trim(header.front().substr(7)));
  if (version.empty() || version[0] != '1') fail("version '" + shorten(version) + "' is not supported (1.x is)");

  // Strip "# " and find the YAML document after "---".
  std::vector<std::string_view> yaml;
  bool started = false;
  for (std::size_t k = 1; k < header.size(); ++k) {
    std::string_view l = header[k].substr(1);
    if (!l.empty() && l.front() == ' ') l.remove_prefix(1);
    if (!started) {
      if (trim(l) == "---") started = true;
      continue;
    }
    yaml.push_back(l);
  }
  if (!started) fail("no '# ---' line opening the YAML header");

  char delimiter = ' ';
  std::vector<EcsvColumn> columns;
  Table t;
  for (std::size_t k = 0; k < yaml.size(); ++k) {
    std::string_view l = yaml[k];
    if (trim(l).empty() || indent_of(l) != 0 || l.front() == '-') continue;
    std::string key;
    std::string_view value;
    if (!key_value(l, key, value)) fail("line '" + shorten(l) + "' is not 'key: value'");
    if (key == "delimiter") {
      const std::string d = scalar(value);
      if (d != " " && d != ",") fail("delimiter '" + shorten(d) + "' is not allowed (a space or a comma)");
      delimiter = d[0];
    } else if (key == "datatype") {
      // A list of column maps, each "- {...}" (flow) or "- key: value" plus
      // further indented "key: value" lines (block).
      while (k + 1 < yaml.size() && (indent_of(yaml[k + 1]) > 0 || trim(yaml[k + 1]).substr(0, 1) == "-")) {
        std::string_view item = trim(yaml[++k]);
        if (item.substr(0, 1) != "-") fail("datatype entry '" + shorten(item) + "' does not start with '-'");
        item = trim(item.substr(1));
        EcsvColumn col;
        if (!item.empty() && item.front() == '{') {
          std::string flow(item);
          int depth = 0;
          for (char c : flow) depth += c == '{' ? 1 : c == '}' ? -1 : 0;
          while (depth > 0 && k + 1 < yaml.size()) {  // a flow map continued on further lines
            std::string_view more = trim(yaml[++k]);
            for (char c : more) depth += c == '{' ? 1 : c == '}' ? -1 : 0;
            flow += " ";
            flow += more;
          }
          if (flow.size() < 2 || flow.back() != '}') fail("datatype entry '" + shorten(flow) + "' is not closed");
          for (std::string_view part : split_flow(std::string_view(flow).substr(1, flow.size() - 2))) {
            std::string ck;
            std::string_view cv;
            if (trim(part).empty()) continue;
            if (!key_value(trim(part), ck, cv)) fail("datatype entry part '" + shorten(part) + "' is not 'key: value'");
            set_column_key(col, ck, cv);
          }
        } else {
          std::string ck;
          std::string_view cv;
          if (!key_value(item, ck, cv)) fail("datatype entry '" + shorten(item) + "' is not 'key: value'");
          set_column_key(col, ck, cv);
          while (k + 1 < yaml.size() && indent_of(yaml[k + 1]) > 0 && trim(yaml[k + 1]).substr(0, 1) != "-") {
            std::string_view sub = trim(yaml[++k]);
            if (key_value(sub, ck, cv) && indent_of(yaml[k]) <= 4) set_column_key(col, ck, cv);
          }
        }
        if (col.name.empty()) fail("a datatype entry has no name");
        if (col.datatype.empty()) col.datatype = "string";  // ECSV 1.0: string is the default
        if (!is_float_type(col.datatype) && !is_int_type(col.datatype) && col.datatype != "string" &&
            col.datatype != "bool")
          fail("column '" + shorten(col.name) + "': datatype '" + shorten(col.datatype) + "' is not supported");
        columns.push_back(std::move(col));
      }
    } else if (key == "meta") {
      // Simple "key: value" pairs: a flow map on the line ({k: v}), or the lines
      // that follow: indented "k: v" (block map) or "- {k: v}" (an ordered map,
      // "!!omap", as astropy writes it).
      auto add_flow = [&](std::string_view flow) {
        for (std::string_view part : split_flow(flow.substr(1, flow.size() - 2))) {
          std::string mk;
          std::string_view mv;
          if (key_value(trim(part), mk, mv) && !mv.empty() && mv.front() != '{' && mv.front() != '[')
            t.set_meta(mk, scalar(mv));
        }
      };
      if (value.size() >= 2 && value.front() == '{' && value.back() == '}') add_flow(value);
      while (k + 1 < yaml.size() && (indent_of(yaml[k + 1]) > 0 || trim(yaml[k + 1]).substr(0, 1) == "-")) {
        std::string_view sub = trim(yaml[++k]);
        if (sub.substr(0, 1) == "-") sub = trim(sub.substr(1));
        std::string mk;
        std::string_view mv;
        if (sub.size() >= 2 && sub.front() == '{' && sub.back() == '}') add_flow(sub);
        else if (indent_of(yaml[k]) <= 2 && key_value(sub, mk, mv) && !mv.empty() && mv.front() != '{' &&
                 mv.front() != '[' && mv.front() != '!')
          t.set_meta(mk, scalar(mv));
      }
    }
    // schema and other keys: not needed to read the table
  }
  if (columns.empty()) fail("no 'datatype:' list of columns");

  CsvReadOptions csv;
  csv.delimiter = delimiter;
  csv.comment = '#';
  for (const auto& c : columns) {
    if (is_float_type(c.datatype)) csv.numeric_columns.push_back(c.name);
    if (c.datatype == "string" || c.datatype == "bool") csv.text_columns.push_back(c.name);
  }
  Table body;
  try {
    body = parse_csv(text.substr(pos), csv);
  } catch (const TableParseError& e) {
    throw TableParseError(std::string("ECSV data: ") + e.what(), e.row, e.column);
  }
  if (body.ncols() != columns.size())
    throw TableParseError("ECSV header row has " + std::to_string(body.ncols()) + " columns, the YAML header declares " +
                          std::to_string(columns.size()));
  for (std::size_t j = 0; j < columns.size(); ++j) {
    const EcsvColumn& decl = columns[j];
    Column c = std::move(body.columns()[j]);
    if (c.name != decl.name)
      throw TableParseError("ECSV header row names column " + std::to_string(j + 1) + " '" + shorten(c.name) +
                            "', the YAML header '" + shorten(decl.name) + "'");
    c.unit = decl.unit;
    c.description = decl.description;
    if (is_float_type(decl.datatype)) {
      if (c.type == ColumnType::Int64) {
        c.f64.assign(c.i64.begin(), c.i64.end());
        c.i64.clear();
        c.type = ColumnType::Float64;
      }
    } else if (is_int_type(decl.datatype)) {
      if (c.type == ColumnType::Text) {
        for (std::size_t i = 0; i < c.text.size(); ++i)
          if (!trim(c.text[i]).empty()) {
            std::int64_t v;
            if (!parse_int(c.text[i], v))
              throw TableParseError("ECSV " + where(i + 1, c.name) + ": '" + shorten(c.text[i]) +
                                        "' is not an integer (declared " + decl.datatype + ")",
                                    i + 1, c.name);
          }
      }
      if (c.type == ColumnType::Float64) {  // empty cells (nulls): keep NaN, but the rest must be integers
        for (std::size_t i = 0; i < c.f64.size(); ++i)
          if (std::isfinite(c.f64[i]) && std::floor(c.f64[i]) != c.f64[i])
            throw TableParseError("ECSV " + where(i + 1, c.name) + ": not an integer (declared " + decl.datatype + ")",
                                  i + 1, c.name);
      }
    }  // string or bool: kept as Text, cells as written (CsvReadOptions::text_columns)
    t.add(std::move(c));
  }
  return t;
}

}  // namespace skerry
