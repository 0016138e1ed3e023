#pragma once
/// Small helpers shared by the report's sections (report_page.cpp, report_match.cpp):
/// number formatting, table columns as doubles, medians, histograms, figures.
#include <string>
#include <vector>

#include "io/table_io.h"

namespace skerry::report_util {

/// printf-style formatting of one number.
std::string fmt(const char* f, double v);
/// A numeric column as doubles (NaN for every row when absent or not numeric).
std::vector<double> column(const Table& t, const std::string& name);
/// Median of the finite values (NaN when none).
double median(std::vector<double> v);
/// Histogram with `nb` equal bins over the finite values (edges, counts); lo, hi
/// fix the range where finite.
void histogram(const std::vector<double>& v, int nb, std::vector<double>& edges, std::vector<double>& counts,
               double lo, double hi);
/// A plot with its caption.
std::string figure(const std::string& svg, const std::string& caption);

}  // namespace skerry::report_util
