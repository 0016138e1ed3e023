#pragma once
/// Small text helpers shared by the FITS image reader/writer and the WCS reader
/// (header cards are 80 ASCII columns, values padded with blanks).
#include <cctype>
#include <string>

namespace skerry::header_text {

/// `s` without leading and trailing blanks.
inline std::string trim(const std::string& s) {
  const std::size_t b = s.find_first_not_of(' ');
  if (b == std::string::npos) return "";
  const std::size_t e = s.find_last_not_of(' ');
  return s.substr(b, e - b + 1);
}

/// ASCII upper case.
inline std::string upper(std::string s) {
  for (char& c : s) c = static_cast<char>(std::toupper(static_cast<unsigned char>(c)));
  return s;
}

/// Line breaks and tabs as blanks, trimmed: a library message fit for one error line.
inline std::string one_line(std::string s) {
  for (char& c : s)
    if (c == '\n' || c == '\r' || c == '\t') c = ' ';
  return trim(s);
}

}  // namespace skerry::header_text
