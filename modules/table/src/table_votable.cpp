// IVOA VOTable 1.4 (Ochsenbein et al. 2019, IVOA Recommendation "VOTable Format
// Definition Version 1.4"): written as TABLEDATA; read from TABLEDATA, BINARY and
// BINARY2 (section 5 of the Recommendation: base64 streams of big-endian values,
// BINARY2 with a per-row null bit mask) and from any TABLE of the document. The reader is a small
// non-validating XML 1.0 tokenizer (Bray et al., W3C XML 1.0 5th ed.): elements,
// attributes, the five predefined entities and character references, comments,
// CDATA, processing instructions and a DOCTYPE without internal subset. It is
// iterative (no recursion), so deep nesting cannot overflow the stack.
#include <cmath>
#include <climits>
#include <cstdint>
#include <cstring>
#include <string>
#include <string_view>
#include <unordered_set>
#include <vector>

#include "skerry/table_text.h"
#include "table_text_internal.h"

namespace skerry {

using namespace table_detail;

// ---- writer -----------------------------------------------------------------------

namespace {

/// Decode one UTF-8 sequence at s[i]; returns the code point or -1 when invalid,
/// advancing i past the bytes consumed.
long decode_utf8(std::string_view s, std::size_t& i) {
  unsigned char c = static_cast<unsigned char>(s[i]);
  int len = c < 0x80 ? 1 : (c >> 5) == 6 ? 2 : (c >> 4) == 14 ? 3 : (c >> 3) == 30 ? 4 : 0;
  if (len == 0) {
    ++i;
    return -1;
  }
  if (i + len > s.size()) {
    ++i;
    return -1;
  }
  long cp = len == 1 ? c : len == 2 ? (c & 0x1f) : len == 3 ? (c & 0x0f) : (c & 0x07);
  for (int k = 1; k < len; ++k) {
    unsigned char cc = static_cast<unsigned char>(s[i + k]);
    if ((cc >> 6) != 2) {
      ++i;
      return -1;
    }
    cp = (cp << 6) | (cc & 0x3f);
  }
  // Reject overlong forms and surrogates.
  static const long min_cp[5] = {0, 0, 0x80, 0x800, 0x10000};
  if (cp < min_cp[len] || (cp >= 0xD800 && cp <= 0xDFFF) || cp > 0x10FFFF) {
    ++i;
    return -1;
  }
  i += len;
  return cp;
}

bool xml_char_ok(long cp) {
  return cp == 0x9 || cp == 0xA || cp == 0xD || (cp >= 0x20 && cp <= 0xD7FF) || (cp >= 0xE000 && cp <= 0xFFFD) ||
         (cp >= 0x10000 && cp <= 0x10FFFF);
}

/// XML-escape text for element content or a double-quoted attribute value.
/// Invalid UTF-8 and characters XML 1.0 forbids become U+FFFD.
void escape(std::string& out, std::string_view s, bool attribute) {
  for (std::size_t i = 0; i < s.size();) {
    std::size_t start = i;
    long cp = decode_utf8(s, i);
    if (cp < 0 || !xml_char_ok(cp)) {
      out += "\xEF\xBF\xBD";
      continue;
    }
    switch (cp) {
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '&': out += "&amp;"; break;
      case '"': out += attribute ? "&quot;" : "\""; break;
      case '\n': out += attribute ? "&#10;" : "\n"; break;
      case '\r': out += "&#13;"; break;
      case '\t': out += attribute ? "&#9;" : "\t"; break;
      default: out.append(s.substr(start, i - start));
    }
  }
}

std::string esc(std::string_view s, bool attribute = true) {
  std::string o;
  escape(o, s, attribute);
  return o;
}

std::string vot_double(double v) {
  if (std::isnan(v)) return {};
  if (std::isinf(v)) return v > 0 ? "+Inf" : "-Inf";
  return format_double(v);
}

}  // namespace

std::string format_votable(const Table& t) {
  t.check_consistent();
  std::string o;
  o += "<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n";
  // VOTable 1.4 keeps the 1.3 namespace (VOTable 1.4 Recommendation, sec. 1.2).
  o += "<VOTABLE version=\"1.4\" xmlns:xsi=\"http://www.w3.org/2001/XMLSchema-instance\" "
       "xmlns=\"http://www.ivoa.net/xml/VOTable/v1.3\" "
       "xsi:schemaLocation=\"http://www.ivoa.net/xml/VOTable/v1.3 "
       "http://www.ivoa.net/xml/VOTable/VOTable-1.4.xsd\">\n";
  o += " <RESOURCE type=\"results\">\n";
  for (const auto& [k, v] : t.meta)
    o += "  <INFO name=\"" + esc(k.empty() ? std::string("meta") : k) + "\" value=\"" + esc(v) + "\"/>\n";
  o += "  <TABLE name=\"" + esc(t.name.empty() ? std::string("table") : t.name) + "\" nrows=\"" +
       std::to_string(t.rows()) + "\">\n";
  for (const auto& c : t.columns()) {
    o += "   <FIELD name=\"" + esc(c.name) + "\"";
    switch (c.type) {
      case ColumnType::Float64: o += " datatype=\"double\""; break;
      case ColumnType::Int64: o += " datatype=\"long\""; break;
      case ColumnType::Text: {
        // char is 7-bit ASCII in VOTable; any other text needs unicodeChar.
        bool ascii = true;
        for (const auto& s : c.text)
          for (char ch : s) ascii &= static_cast<unsigned char>(ch) < 0x80;
        o += ascii ? " datatype=\"char\" arraysize=\"*\"" : " datatype=\"unicodeChar\" arraysize=\"*\"";
        break;
      }
    }
    if (!c.unit.empty()) o += " unit=\"" + esc(c.unit) + "\"";
    if (!c.ucd.empty()) o += " ucd=\"" + esc(c.ucd) + "\"";
    if (c.description.empty()) {
      o += "/>\n";
    } else {
      o += ">\n    <DESCRIPTION>" + esc(c.description, false) + "</DESCRIPTION>\n   </FIELD>\n";
    }
  }
  o += "   <DATA>\n    <TABLEDATA>\n";
  const auto& cols = t.columns();
  const std::size_t n = t.rows();
  for (std::size_t i = 0; i < n; ++i) {
    o += "     <TR>";
    for (const auto& c : cols) {
      o += "<TD>";
      switch (c.type) {
        case ColumnType::Float64: o += vot_double(c.f64[i]); break;
        case ColumnType::Int64: o += format_int(c.i64[i]); break;
        case ColumnType::Text: escape(o, c.text[i], false); break;
      }
      o += "</TD>";
    }
    o += "</TR>\n";
  }
  o += "    </TABLEDATA>\n   </DATA>\n  </TABLE>\n </RESOURCE>\n</VOTABLE>\n";
  return o;
}

// ---- reader -------------------------------------------------------------------------

namespace {

struct Attr {
  std::string name, value;
};

[[noreturn]] void fail(const std::string& why, std::size_t line) {
  throw TableParseError("VOTable line " + std::to_string(line) + ": " + why);
}

void append_utf8(std::string& out, unsigned long cp) {
  if (cp < 0x80) {
    out += static_cast<char>(cp);
  } else if (cp < 0x800) {
    out += static_cast<char>(0xC0 | (cp >> 6));
    out += static_cast<char>(0x80 | (cp & 0x3f));
  } else if (cp < 0x10000) {
    out += static_cast<char>(0xE0 | (cp >> 12));
    out += static_cast<char>(0x80 | ((cp >> 6) & 0x3f));
    out += static_cast<char>(0x80 | (cp & 0x3f));
  } else {
    out += static_cast<char>(0xF0 | (cp >> 18));
    out += static_cast<char>(0x80 | ((cp >> 12) & 0x3f));
    out += static_cast<char>(0x80 | ((cp >> 6) & 0x3f));
    out += static_cast<char>(0x80 | (cp & 0x3f));
  }
}

/// Replace entity and character references in raw text.
void unescape_into(std::string& out, std::string_view raw, std::size_t line) {
  for (std::size_t i = 0; i < raw.size(); ++i) {
    char c = raw[i];
    if (c != '&') {
      out += c;
      continue;
    }
    std::size_t semi = raw.find(';', i);
    if (semi == std::string_view::npos || semi - i > 12) fail("'&' not followed by an entity reference", line);
    std::string_view ent = raw.substr(i + 1, semi - i - 1);
    if (ent == "lt") out += '<';
    else if (ent == "gt") out += '>';
    else if (ent == "amp") out += '&';
    else if (ent == "quot") out += '"';
    else if (ent == "apos") out += '\'';
    else if (ent.size() >= 2 && ent[0] == '#') {
      unsigned long cp = 0;
      bool hex = ent[1] == 'x';
      std::string_view digits = ent.substr(hex ? 2 : 1);
      if (digits.empty()) fail("empty character reference", line);
      for (char d : digits) {
        int v;
        if (d >= '0' && d <= '9') v = d - '0';
        else if (hex && d >= 'a' && d <= 'f') v = d - 'a' + 10;
        else if (hex && d >= 'A' && d <= 'F') v = d - 'A' + 10;
        else fail("bad character reference '&" + shorten(ent) + ";'", line);
        cp = cp * (hex ? 16 : 10) + static_cast<unsigned long>(v);
        if (cp > 0x10FFFF) fail("character reference out of range", line);
      }
      if (!xml_char_ok(static_cast<long>(cp))) fail("character reference to a character XML forbids", line);
      append_utf8(out, cp);
    } else {
      fail("unknown entity '&" + shorten(ent) + ";' (no DTD entities are supported)", line);
    }
    i = semi;
  }
}

std::string_view local_name(std::string_view qname) {
  auto c = qname.rfind(':');
  return c == std::string_view::npos ? qname : qname.substr(c + 1);
}

bool is_name_char(char c) {
  return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') || c == '_' || c == ':' ||
         c == '-' || c == '.' || static_cast<unsigned char>(c) >= 0x80;
}

struct FieldDef {
  std::string name, datatype, unit, ucd, description, arraysize, null_value;
  ColumnType type = ColumnType::Float64;
  bool has_null = false;
};

ColumnType type_of(const FieldDef& f, std::size_t line) {
  const std::string& d = f.datatype;
  bool scalar = f.arraysize.empty() || f.arraysize == "1";
  if (d == "char" || d == "unicodeChar") return ColumnType::Text;
  if (!scalar) fail("FIELD '" + shorten(f.name) + "': array columns (arraysize=\"" + shorten(f.arraysize) +
                        "\") are not supported", line);
  if (d == "double" || d == "float") return ColumnType::Float64;
  if (d == "long" || d == "int" || d == "short" || d == "unsignedByte") return ColumnType::Int64;
  if (d == "boolean" || d == "bit") return ColumnType::Text;
  if (d == "floatComplex" || d == "doubleComplex") fail("FIELD '" + shorten(f.name) + "': complex columns are not supported", line);
  if (d.empty()) fail("FIELD '" + shorten(f.name) + "' has no datatype", line);
  fail("FIELD '" + shorten(f.name) + "': unknown datatype '" + shorten(d) + "'", line);
}


/// RFC 4648 section 4 base64 (the VOTable STREAM encoding); white space between
/// characters is ignored, as the VOTable Recommendation (section 5.3) allows.
std::vector<unsigned char> decode_base64(std::string_view s, std::size_t line) {
  std::vector<unsigned char> out;
  out.reserve(s.size() * 3 / 4);
  std::uint32_t acc = 0;
  int bits = 0;
  bool padded = false;
  for (char ch : s) {
    int v;
    if (ch >= 'A' && ch <= 'Z') v = ch - 'A';
    else if (ch >= 'a' && ch <= 'z') v = ch - 'a' + 26;
    else if (ch >= '0' && ch <= '9') v = ch - '0' + 52;
    else if (ch == '+') v = 62;
    else if (ch == '/') v = 63;
    else if (ch == '=') { padded = true; continue; }
    else if (ch == ' ' || ch == '\n' || ch == '\r' || ch == '\t') continue;
    else fail("STREAM: '" + shorten(std::string_view(&ch, 1)) + "' is not a base64 character", line);
    if (padded) fail("STREAM: base64 data after the '=' padding", line);
    acc = (acc << 6) | static_cast<std::uint32_t>(v);
    bits += 6;
    if (bits >= 8) {
      bits -= 8;
      out.push_back(static_cast<unsigned char>((acc >> bits) & 0xFF));
    }
  }
  return out;
}

/// Reads big-endian values from a decoded BINARY/BINARY2 stream; every read is
/// bounds-checked (a short stream is an error naming the row and FIELD).
struct StreamReader {
  const std::vector<unsigned char>& b;
  std::size_t pos = 0;
  std::size_t line = 0;
  void need(std::size_t k, std::size_t row, const std::string& field) const {
    if (k > b.size() - pos)
      fail("STREAM ends inside row " + std::to_string(row) + ", FIELD '" + shorten(field) + "'", line);
  }
  std::uint64_t uint(int bytes, std::size_t row, const std::string& field) {
    need(static_cast<std::size_t>(bytes), row, field);
    std::uint64_t v = 0;
    for (int k = 0; k < bytes; ++k) v = (v << 8) | b[pos++];
    return v;
  }
};

/// Bytes of one scalar of a VOTable datatype (Recommendation table 1).
int binary_width(const std::string& d) {
  if (d == "double" || d == "long") return 8;
  if (d == "float" || d == "int") return 4;
  if (d == "short" || d == "unicodeChar") return 2;
  return 1;  // unsignedByte, char, boolean
}

/// The number of values of a FIELD in a row: a fixed arraysize "N" (or "NxM":
/// the product), or, for "*" / "N*", a 4-byte count before the values.
std::size_t binary_count(const FieldDef& f, StreamReader& r, std::size_t row) {
  const std::string& a = f.arraysize;
  if (a.empty()) return 1;
  if (a.back() == '*') return static_cast<std::size_t>(r.uint(4, row, f.name));
  std::size_t n = 1, cur = 0;
  bool any = false;
  for (char ch : a) {
    if (ch >= '0' && ch <= '9') {
      cur = cur * 10 + static_cast<std::size_t>(ch - '0');
      any = true;
      if (cur > (1u << 24)) fail("FIELD '" + shorten(f.name) + "': arraysize too large", r.line);
    } else if (ch == 'x') {
      n *= cur;
      cur = 0;
      if (n > (1u << 24)) fail("FIELD '" + shorten(f.name) + "': arraysize too large", r.line);
    } else {
      fail("FIELD '" + shorten(f.name) + "': bad arraysize '" + shorten(a) + "'", r.line);
    }
  }
  if (!any) fail("FIELD '" + shorten(f.name) + "': bad arraysize '" + shorten(a) + "'", r.line);
  return n * cur;
}

/// Decode the rows of a BINARY (binary2 = false) or BINARY2 stream into the
/// columns (Recommendation section 5.4: values big-endian in FIELD order; BINARY2
/// rows start with ceil(nfields/8) bytes whose bits, most significant first,
/// flag null values). Floating-point nulls are NaN; integer nulls are the FIELD's
/// VALUES null (BINARY) or the mask bit (BINARY2).
void decode_binary_rows(const std::vector<unsigned char>& bytes, bool binary2, const std::vector<FieldDef>& fields,
                        std::vector<Column>& cols, std::vector<std::vector<char>>& int_null, std::size_t& row,
                        std::size_t line) {
  StreamReader r{bytes, 0, line};
  const std::size_t mask_bytes = binary2 ? (fields.size() + 7) / 8 : 0;
  while (r.pos < bytes.size()) {
    const std::size_t row_start = r.pos;
    ++row;
    std::vector<unsigned char> mask(mask_bytes, 0);
    for (auto& m : mask) m = static_cast<unsigned char>(r.uint(1, row, "(null mask)"));
    for (std::size_t j = 0; j < fields.size(); ++j) {
      const FieldDef& f = fields[j];
      Column& c = cols[j];
      const bool masked = binary2 && (mask[j / 8] & (0x80u >> (j % 8)));
      const std::size_t count = binary_count(f, r, row);
      const int w = binary_width(f.datatype);
      r.need(count * static_cast<std::size_t>(w), row, f.name);
      if (c.type == ColumnType::Text) {
        std::string v;
        for (std::size_t k = 0; k < count; ++k) {
          const std::uint64_t u = r.uint(w, row, f.name);
          if (f.datatype == "unicodeChar") append_utf8(v, static_cast<unsigned long>(u));
          else if (f.datatype == "boolean") v.push_back(u == 'T' || u == 't' || u == '1' ? 'T' : u == 'F' || u == 'f' || u == '0' ? 'F' : '?');
          else v.push_back(static_cast<char>(u));
        }
        if (f.datatype == "char" || f.datatype == "unicodeChar") {
          const std::size_t nul = v.find('\0');  // fixed-size strings are NUL padded
          if (nul != std::string::npos) v.resize(nul);
        }
        c.text.push_back(masked ? std::string() : v);
        continue;
      }
      if (count != 1) fail("FIELD '" + shorten(f.name) + "': array values are not supported", line);
      const std::uint64_t u = r.uint(w, row, f.name);
      if (c.type == ColumnType::Float64) {
        double d;
        if (w == 8) {
          std::memcpy(&d, &u, 8);
        } else {
          const std::uint32_t u32 = static_cast<std::uint32_t>(u);
          float fl;
          std::memcpy(&fl, &u32, 4);
          d = fl;
        }
        c.f64.push_back(masked ? std::nan("") : d);
      } else {
        std::int64_t iv;
        if (f.datatype == "long") iv = static_cast<std::int64_t>(u);
        else if (f.datatype == "int") iv = static_cast<std::int32_t>(static_cast<std::uint32_t>(u));
        else if (f.datatype == "short") iv = static_cast<std::int16_t>(static_cast<std::uint16_t>(u));
        else iv = static_cast<std::int64_t>(u);  // unsignedByte
        bool is_null = masked;
        if (!is_null && f.has_null) {
          std::int64_t nv = 0;
          is_null = parse_int(trim(f.null_value), nv) && nv == iv;
        }
        c.i64.push_back(iv);
        int_null[j].push_back(is_null ? 1 : 0);
      }
    }
    if (r.pos == row_start) fail("STREAM rows hold no bytes (every FIELD has arraysize 0)", line);
  }
}

}  // namespace

Table parse_votable(std::string_view text, const VotableReadOptions& opt) {
  const std::size_t n = text.size();
  std::size_t pos = 0, line = 1;
  if (text.substr(0, 3) == "\xEF\xBB\xBF") pos = 3;

  auto advance_to = [&](std::size_t to) {
    for (std::size_t k = pos; k < to && k < n; ++k)
      if (text[k] == '\n') ++line;
    pos = to;
  };

  std::vector<std::string> stack;  // open element local names
  bool seen_root = false, root_closed = false;

  // Document state.
  Table t;
  std::vector<FieldDef> fields;
  std::vector<Column> cols;
  std::vector<std::vector<char>> int_null;  // per Int64 column: null flags
  bool in_table = false, table_done = false, in_data = false, got_votable = false;
  bool in_tr = false, in_td = false;
  std::size_t table_depth = 0;
  // TABLE selection (opt.table): "" = the first TABLE; all digits = 0-based index
  // in document order; otherwise the TABLE's name or ID. Other TABLEs are skipped
  // (still checked as XML).
  const bool select_by_index =
      !opt.table.empty() && opt.table.find_first_not_of("0123456789") == std::string::npos && opt.table.size() < 10;
  const std::size_t wanted_index = select_by_index ? std::stoul(opt.table) : 0;
  std::size_t tables_seen = 0;
  std::size_t skip_depth = 0;  // > 0 while inside a TABLE that is not the selected one
  std::vector<std::string> table_names;
  // BINARY / BINARY2 streams.
  bool in_stream = false, stream_binary2 = false, in_binary = false;
  std::string stream_text;
  std::size_t row = 0, cell = 0;
  std::string td_text;
  std::string desc_text;
  bool in_field_desc = false;
  // Index (not pointer) of the FIELD being read: fields may reallocate.
  std::size_t cur_field = SIZE_MAX;

  auto start_data = [&]() {
    if (!cols.empty()) {
      if (cols.size() == fields.size()) return;
      // A FIELD between two DATA elements (found by fuzz_votable).
      fail("FIELD after the TABLE's DATA", line);
    }
    if (fields.empty()) fail("TABLE has DATA but no FIELD", line);
    std::unordered_set<std::string> seen;
    for (auto& f : fields) {
      if (f.name.empty()) fail("FIELD without a name", line);
      if (!seen.insert(f.name).second) fail("duplicate FIELD name '" + shorten(f.name) + "'", line);
      f.type = type_of(f, line);
      Column c;
      c.name = f.name;
      c.unit = f.unit;
      c.ucd = f.ucd;
      c.description = f.description;
      c.type = f.type;
      cols.push_back(std::move(c));
    }
    int_null.assign(fields.size(), {});
  };

  auto end_cell = [&]() {
    if (cell >= fields.size())
      fail("row " + std::to_string(row) + " has more TD cells than the " + std::to_string(fields.size()) + " FIELDs",
           line);
    const FieldDef& f = fields[cell];
    Column& c = cols[cell];
    std::string_view v = trim(td_text);
    bool is_null = v.empty() || (f.has_null && v == trim(f.null_value));
    switch (c.type) {
      case ColumnType::Float64: {
        double d = std::nan("");
        if (!is_null) {
          if (v == "NaN" || v == "nan") d = std::nan("");
          else if (v == "+Inf" || v == "Inf" || v == "inf" || v == "+inf") d = HUGE_VAL;
          else if (v == "-Inf" || v == "-inf") d = -HUGE_VAL;
          else if (!parse_double(v, d))
            throw TableParseError("VOTable " + where(row, f.name) + ": '" + shorten(v) + "' is not a number", row,
                                  f.name);
        }
        c.f64.push_back(d);
        break;
      }
      case ColumnType::Int64: {
        std::int64_t iv = 0;
        if (!is_null) {
          bool ok = parse_int(v, iv);
          if (!ok && v.size() > 2 && v[0] == '0' && (v[1] == 'x' || v[1] == 'X')) {
            // VOTable allows hexadecimal integers.
            ok = true;
            std::uint64_t u = 0;
            for (char ch : v.substr(2)) {
              int dg = (ch >= '0' && ch <= '9') ? ch - '0' : (ch >= 'a' && ch <= 'f') ? ch - 'a' + 10
                       : (ch >= 'A' && ch <= 'F') ? ch - 'A' + 10 : -1;
              if (dg < 0 || u > (UINT64_MAX >> 4)) { ok = false; break; }
              u = u * 16 + static_cast<unsigned>(dg);
            }
            iv = static_cast<std::int64_t>(u);
          }
          if (!ok)
            throw TableParseError("VOTable " + where(row, f.name) + ": '" + shorten(v) + "' is not an integer", row,
                                  f.name);
        }
        c.i64.push_back(iv);
        int_null[cell].push_back(is_null ? 1 : 0);
        break;
      }
      case ColumnType::Text: c.text.push_back(td_text); break;
    }
    ++cell;
  };

  auto attr_value = [](const std::vector<Attr>& attrs, std::string_view key) -> const std::string* {
    for (const auto& a : attrs)
      if (a.name == key) return &a.value;
    return nullptr;
  };

  std::vector<Attr> attrs;
  while (pos < n) {
    if (text[pos] != '<') {
      std::size_t lt = text.find('<', pos);
      if (lt == std::string_view::npos) lt = n;
      std::string_view raw = text.substr(pos, lt - pos);
      if (in_td) {
        unescape_into(td_text, raw, line);
      } else if (in_stream) {
        if (stream_text.size() + raw.size() > (std::size_t{1} << 34)) fail("STREAM too large", line);
        unescape_into(stream_text, raw, line);
      } else if (in_field_desc) {
        unescape_into(desc_text, raw, line);
      } else if (stack.empty() || table_done) {
        if (trim(raw).size() && !table_done) fail("text outside the root element", line);
      } else if (raw.find('&') != std::string_view::npos) {
        std::string sink;
        unescape_into(sink, raw, line);  // validate references even where ignored
      }
      advance_to(lt);
      continue;
    }
    // Markup.
    if (text.compare(pos, 4, "<!--") == 0) {
      std::size_t e = text.find("-->", pos + 4);
      if (e == std::string_view::npos) fail("comment not closed", line);
      advance_to(e + 3);
      continue;
    }
    if (text.compare(pos, 9, "<![CDATA[") == 0) {
      std::size_t e = text.find("]]>", pos + 9);
      if (e == std::string_view::npos) fail("CDATA section not closed", line);
      std::string_view raw = text.substr(pos + 9, e - pos - 9);
      if (in_td) td_text.append(raw);
      else if (in_field_desc) desc_text.append(raw);
      advance_to(e + 3);
      continue;
    }
    if (text.compare(pos, 2, "<?") == 0) {
      std::size_t e = text.find("?>", pos + 2);
      if (e == std::string_view::npos) fail("processing instruction not closed", line);
      advance_to(e + 2);
      continue;
    }
    if (text.compare(pos, 9, "<!DOCTYPE") == 0) {
      if (seen_root) fail("DOCTYPE after the root element", line);
      std::size_t e = text.find('>', pos);
      std::size_t b = text.find('[', pos);
      if (b != std::string_view::npos && (e == std::string_view::npos || b < e))
        fail("DOCTYPE with an internal subset is not supported", line);
      if (e == std::string_view::npos) fail("DOCTYPE not closed", line);
      advance_to(e + 1);
      continue;
    }
    if (text.compare(pos, 2, "<!") == 0) fail("unsupported markup declaration", line);
    bool closing = pos + 1 < n && text[pos + 1] == '/';
    std::size_t p = pos + (closing ? 2 : 1);
    std::size_t nb = p;
    while (p < n && is_name_char(text[p])) ++p;
    if (p == nb) fail("'<' not followed by an element name", line);
    std::string qname(text.substr(nb, p - nb));
    std::string name(local_name(qname));
    attrs.clear();
    bool self_close = false;
    std::size_t tag_line = line;
    // Attributes.
    while (true) {
      while (p < n && (text[p] == ' ' || text[p] == '\t' || text[p] == '\n' || text[p] == '\r')) ++p;
      if (p >= n) fail("tag <" + shorten(qname) + "> not closed", tag_line);
      if (text[p] == '>') {
        ++p;
        break;
      }
      if (text[p] == '/' && !closing) {
        if (p + 1 < n && text[p + 1] == '>') {
          self_close = true;
          p += 2;
          break;
        }
        fail("stray '/' in tag <" + shorten(qname) + ">", tag_line);
      }
      if (closing) fail("attributes in a closing tag </" + shorten(qname) + ">", tag_line);
      std::size_t ab = p;
      while (p < n && is_name_char(text[p])) ++p;
      if (p == ab) fail("bad attribute syntax in <" + shorten(qname) + ">", tag_line);
      std::string aname(text.substr(ab, p - ab));
      while (p < n && (text[p] == ' ' || text[p] == '\t' || text[p] == '\n' || text[p] == '\r')) ++p;
      if (p >= n || text[p] != '=') fail("attribute '" + shorten(aname) + "' has no value", tag_line);
      ++p;
      while (p < n && (text[p] == ' ' || text[p] == '\t' || text[p] == '\n' || text[p] == '\r')) ++p;
      if (p >= n || (text[p] != '"' && text[p] != '\'')) fail("attribute '" + shorten(aname) + "' value not quoted", tag_line);
      char q = text[p++];
      std::size_t ve = text.find(q, p);
      if (ve == std::string_view::npos) fail("attribute '" + shorten(aname) + "' value not closed", tag_line);
      std::string_view raw = text.substr(p, ve - p);
      if (raw.find('<') != std::string_view::npos) fail("'<' inside an attribute value", tag_line);
      Attr a;
      a.name = std::string(local_name(aname));
      unescape_into(a.value, raw, tag_line);
      for (const auto& o : attrs)
        if (o.name == a.name && aname.find(':') == std::string::npos) fail("duplicate attribute '" + shorten(aname) + "'", tag_line);
      attrs.push_back(std::move(a));
      p = ve + 1;
    }
    advance_to(p);

    if (closing) {
      if (stack.empty() || stack.back() != name)
        fail("closing tag </" + shorten(qname) + "> does not match " +
                 (stack.empty() ? std::string("any open element") : "<" + shorten(stack.back()) + ">"),
             tag_line);
      stack.pop_back();
      if (stack.empty()) root_closed = true;
      if (skip_depth > 0) {
        if (stack.size() < skip_depth) skip_depth = 0;
        continue;
      }
      if (table_done) continue;
      if (name == "STREAM" && in_stream) {
        in_stream = false;
        decode_binary_rows(decode_base64(stream_text, tag_line), stream_binary2, fields, cols, int_null, row,
                           tag_line);
        stream_text.clear();
        continue;
      }
      if ((name == "BINARY" || name == "BINARY2") && in_binary) {
        in_binary = false;
        continue;
      }
      if (name == "TD" && in_td) {
        end_cell();
        in_td = false;
      } else if (name == "TR" && in_tr) {
        if (cell != fields.size())
          fail("row " + std::to_string(row) + " has " + std::to_string(cell) + " TD cells, expected " +
                   std::to_string(fields.size()),
               tag_line);
        in_tr = false;
      } else if (name == "DESCRIPTION" && in_field_desc) {
        if (cur_field < fields.size()) fields[cur_field].description = std::string(trim(desc_text));
        in_field_desc = false;
      } else if (name == "FIELD") {
        cur_field = SIZE_MAX;
      } else if (name == "TABLE" && in_table && stack.size() == table_depth) {
        in_table = false;
        table_done = true;
      } else if (name == "DATA") {
        in_data = false;
      }
      continue;
    }

    // Opening tag.
    if (stack.empty()) {
      if (root_closed) fail("more than one root element", tag_line);
      if (name != "VOTABLE") fail("root element is <" + shorten(qname) + ">, not <VOTABLE>", tag_line);
      got_votable = true;
    }
    seen_root = true;
    if (stack.size() > 256) fail("elements nested too deeply", tag_line);
    if (!self_close) stack.push_back(name);
    if (skip_depth > 0) continue;
    if (name == "TABLE" && !in_table) {
      const std::string* tn = attr_value(attrs, "name");
      const std::string* tid = attr_value(attrs, "ID");
      table_names.push_back(tn ? *tn : tid ? *tid : std::string());
      const std::size_t index = tables_seen++;
      const bool selected = table_done ? false
                            : opt.table.empty() ? true
                            : select_by_index  ? index == wanted_index
                                               : (tn && *tn == opt.table) || (tid && *tid == opt.table);
      if (!selected) {
        if (!self_close) skip_depth = stack.size();
        continue;
      }
    }
    if (table_done) continue;
    if (in_td) fail("element <" + shorten(qname) + "> inside a TD", tag_line);
    if (in_stream) fail("element <" + shorten(qname) + "> inside a STREAM", tag_line);

    if (name == "TABLE") {
      if (!in_table) {
        in_table = true;
        table_depth = stack.size() - (self_close ? 0 : 1);
        if (const std::string* v = attr_value(attrs, "name")) t.name = *v;
        if (self_close) {
          in_table = false;
          table_done = true;
        }
      }
    } else if (name == "FIELD" && in_table) {
      if (in_data) fail("FIELD after DATA", tag_line);
      FieldDef f;
      for (const auto& a : attrs) {
        if (a.name == "name") f.name = a.value;
        else if (a.name == "datatype") f.datatype = a.value;
        else if (a.name == "unit") f.unit = a.value;
        else if (a.name == "ucd") f.ucd = a.value;
        else if (a.name == "arraysize") f.arraysize = a.value;
      }
      if (f.name.empty())
        if (const std::string* v = attr_value(attrs, "ID")) f.name = *v;
      if (fields.size() >= 100000) fail("too many FIELDs", tag_line);
      fields.push_back(std::move(f));
      cur_field = self_close ? SIZE_MAX : fields.size() - 1;
    } else if (name == "DESCRIPTION" && cur_field < fields.size() && stack.size() >= 2 && stack[stack.size() - 2] == "FIELD") {
      in_field_desc = !self_close;
      desc_text.clear();
    } else if (name == "VALUES" && cur_field < fields.size()) {
      if (const std::string* v = attr_value(attrs, "null")) {
        fields[cur_field].null_value = *v;
        fields[cur_field].has_null = true;
      }
    } else if ((name == "INFO" || name == "PARAM") && !in_data) {
      const std::string* k = attr_value(attrs, "name");
      const std::string* v = attr_value(attrs, "value");
      if (k && v) t.set_meta(*k, *v);
    } else if (name == "DATA" && in_table) {
      in_data = true;
      start_data();
    } else if ((name == "BINARY" || name == "BINARY2") && in_data) {
      in_binary = !self_close;
      stream_binary2 = name == "BINARY2";
    } else if (name == "STREAM" && in_binary) {
      if (attr_value(attrs, "href"))
        fail("<STREAM href=...>: data in another file or URL is not read; only inline streams are", tag_line);
      const std::string* enc = attr_value(attrs, "encoding");
      if (!enc || *enc != "base64")
        fail("<STREAM> encoding '" + shorten(enc ? *enc : std::string()) + "' is not supported; only base64 is",
             tag_line);
      in_stream = !self_close;
      stream_text.clear();
    } else if (name == "FITS" && in_data) {
      fail("<FITS> serialisation is not supported; TABLEDATA, BINARY and BINARY2 can be read", tag_line);
    } else if (name == "TR" && in_data) {
      if (in_tr) fail("TR inside TR", tag_line);
      ++row;
      cell = 0;
      in_tr = !self_close;
      if (self_close && !fields.empty()) fail("row " + std::to_string(row) + " has no TD cells", tag_line);
    } else if (name == "TD" && in_tr) {
      td_text.clear();
      if (self_close) end_cell();
      else in_td = true;
    } else if (name == "TD" || name == "TR") {
      fail("<" + name + "> outside TABLEDATA", tag_line);
    }
  }
  if (!got_votable) throw TableParseError("not a VOTable: no <VOTABLE> element");
  if (!stack.empty()) fail("document ends inside <" + shorten(stack.back()) + ">", line);
  if (!table_done) {
    if (opt.table.empty() || tables_seen == 0) throw TableParseError("VOTable has no TABLE");
    std::string list;
    for (std::size_t k = 0; k < table_names.size() && k < 20; ++k)
      list += (k ? ", " : "") + std::to_string(k) + (table_names[k].empty() ? "" : " '" + shorten(table_names[k]) + "'");
    throw TableParseError("VOTable has no TABLE " + std::string(select_by_index ? "number " : "named ") +
                          shorten(opt.table) + " (its " + std::to_string(tables_seen) +
                          " TABLEs, numbered from 0: " + list + ")");
  }
  if (cols.empty() && !fields.empty()) start_data();  // TABLE without DATA: zero rows
  // Integer columns with null cells become Float64 with NaN.
  for (std::size_t j = 0; j < cols.size(); ++j) {
    Column& c = cols[j];
    if (c.type != ColumnType::Int64) continue;
    bool any = false;
    for (char f : int_null[j]) any |= f != 0;
    if (!any) continue;
    c.f64.resize(c.i64.size());
    for (std::size_t i = 0; i < c.i64.size(); ++i)
      c.f64[i] = int_null[j][i] ? std::nan("") : static_cast<double>(c.i64[i]);
    c.i64.clear();
    c.i64.shrink_to_fit();
    c.type = ColumnType::Float64;
  }
  for (auto& c : cols) t.add(std::move(c));
  return t;
}

}  // namespace skerry
