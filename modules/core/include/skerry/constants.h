#pragma once
/// Physical and geometric constants and the conventions skerry follows.
/// Every value records its origin. Conventions (stated once, here):
///  - Pixels: modules use 0-based pixel coordinates, (x, y) = (column, row),
///    x along FITS axis 1. FITS 1-based coordinates appear only in pipeline/io
///    and in catalogue columns whose name ends in `_pix1` (pixel 1.0 = centre of
///    the first pixel; bounding boxes inclusive).
///  - Sizes are FWHM unless a name says sigma.
///  - Position angles are measured from north through east: [0, 180) deg for
///    ellipses, [0, 360) deg for directions.
///  - Catalogue positions are ICRS degrees.
///  - Spectral index: S proportional to nu^alpha (steep spectra negative).
#include <cmath>
#include <numbers>

namespace skerry {

inline constexpr double kPi = std::numbers::pi;
inline constexpr double kDegToRad = kPi / 180.0;
inline constexpr double kRadToDeg = 180.0 / kPi;
inline constexpr double kArcsecToDeg = 1.0 / 3600.0;
inline constexpr double kDegToArcsec = 3600.0;
inline constexpr double kArcsecToRad = kPi / 648000.0;
inline constexpr double kRadToArcsec = 648000.0 / kPi;
inline constexpr double kLn2 = std::numbers::ln2;

/// FWHM = 2 sqrt(2 ln 2) sigma (definition of the normal distribution; REF-GAUSS-01).
inline const double kSigmaToFwhm = 2.0 * std::sqrt(2.0 * kLn2);  // 2.3548200450309493
inline const double kFwhmToSigma = 1.0 / kSigmaToFwhm;           // 0.42466090014400953

/// Area of a unit-peak Gaussian with FWHMs a, b is (pi / (4 ln 2)) a b (REF-GAUSS-02).
inline constexpr double kGaussAreaFactor = kPi / (4.0 * kLn2);    // 1.1330900354567985

}  // namespace skerry
