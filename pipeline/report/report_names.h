#pragma once
/// Every column and file name the report reads, in one place: a rename of the
/// run folder's vocabulary is a change here only.
namespace skerry::report_names {

// ---- files in the run folder: NAME + suffix
inline constexpr const char* kRunRecord = ".run.json";
inline constexpr const char* kComponentsCsv = ".components.csv";
inline constexpr const char* kComponentsFits = ".components.fits";
inline constexpr const char* kComponentsVot = ".components.vot";
inline constexpr const char* kSourcesCsv = ".sources.csv";
inline constexpr const char* kIslandsCsv = ".islands.csv";
inline constexpr const char* kRmsMap = ".rms_map.fits";
inline constexpr const char* kResidualMap = ".residual_map.fits";
inline constexpr const char* kModelMap = ".model_map.fits";
inline constexpr const char* kCompletenessCsv = ".completeness.csv";
inline constexpr const char* kReliabilityCsv = ".reliability.csv";
inline constexpr const char* kReportHtml = ".report.html";
inline constexpr const char* kMatchSummary = ".match_summary.json";
inline constexpr const char* kMatches = ".matches.csv";
inline constexpr const char* kSpectra = ".spectra.csv";

// ---- columns
inline constexpr const char* kComponentId = "component_id";
inline constexpr const char* kIslandId = "island_id";
inline constexpr const char* kSourceId = "source_id";
inline constexpr const char* kDesignation = "designation";
inline constexpr const char* kRa = "ra_deg";
inline constexpr const char* kDec = "dec_deg";
inline constexpr const char* kX = "x_pix1";
inline constexpr const char* kY = "y_pix1";
inline constexpr const char* kSInt = "s_int_jy";
inline constexpr const char* kSIntErr = "s_int_err_jy";
inline constexpr const char* kSPeak = "s_peak_jy_per_beam";
inline constexpr const char* kSPeakErr = "s_peak_err_jy_per_beam";
inline constexpr const char* kSnr = "snr";
inline constexpr const char* kRms = "rms_jy_per_beam";
inline constexpr const char* kMaj = "maj_arcsec";
inline constexpr const char* kMin = "min_arcsec";
inline constexpr const char* kPa = "pa_deg";
inline constexpr const char* kIntrinsicMaj = "intrinsic_maj_arcsec";
inline constexpr const char* kIntrinsicMin = "intrinsic_min_arcsec";
inline constexpr const char* kResolved = "resolved";
inline constexpr const char* kFlags = "flags";
inline constexpr const char* kInfoBits = "info_bits";
inline constexpr const char* kChi2 = "chi2_red";
inline constexpr const char* kNComponents = "n_components";
inline constexpr const char* kNIslands = "n_islands";
inline constexpr const char* kIslandIds = "island_ids";
inline constexpr const char* kStructure = "structure";
inline constexpr const char* kXMin = "x_min_pix1";
inline constexpr const char* kXMax = "x_max_pix1";
inline constexpr const char* kYMin = "y_min_pix1";
inline constexpr const char* kYMax = "y_max_pix1";
inline constexpr const char* kResidualRms = "residual_rms_jy_per_beam";
inline constexpr const char* kMeanRms = "mean_rms_jy_per_beam";
inline constexpr const char* kPeakSnr = "peak_snr";
inline constexpr const char* kCompletenessBinnedBy = "binned_by";
inline constexpr const char* kNegToPos = "negative_to_positive_ratio";

}  // namespace skerry::report_names
