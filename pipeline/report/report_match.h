#pragma once
/// The report's cross-match sections: one per NAME.match_summary.json in the run
/// folder. An ordinary match shows its separations and position offsets; a
/// likelihood-ratio counterpart identification (`match.mode likelihood_ratio`)
/// shows n(m) and q(m), the Q0 fit from the blank fractions, the reliabilities
/// of the candidates and a one-line summary.
#include <string>
#include <vector>

namespace skerry {

struct ReportSection {
  std::string id, title;  ///< anchor and heading
  std::string html;       ///< the section's content (without <section> and <h2>)
};

struct MatchSections {
  std::vector<ReportSection> sections;
  std::vector<std::string> warnings;  ///< where a match could mislead
  std::vector<std::string> missing;   ///< files that could not be read
};

/// The sections of every match in `dir`; `run_name` (NAME) is cut from the
/// titles. Files that cannot be read are reported in `missing`, never thrown.
MatchSections match_sections(const std::string& dir, const std::string& run_name);

}  // namespace skerry
