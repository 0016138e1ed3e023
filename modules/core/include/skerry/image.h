#pragma once
/// In-memory image types shared by every stage.
///
/// An image is a row-major Eigen array indexed (row, col) = (y, x), 0-based,
/// x along FITS axis 1, so its memory layout is the FITS layout. NaN means
/// "no data" (FITS BLANK and NaN are both turned into NaN by the reader).
#include <Eigen/Core>
#include <cstdint>
#include <string>

namespace skerry {

using ImageF = Eigen::Array<float, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using ImageD = Eigen::Array<double, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using MaskU8 = Eigen::Array<std::uint8_t, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;
using LabelsI32 = Eigen::Array<std::int32_t, Eigen::Dynamic, Eigen::Dynamic, Eigen::RowMajor>;

/// Restoring beam: FWHMs and position angle east of north.
struct Beam {
  double maj_arcsec = 0.0;  ///< major-axis FWHM [arcsec]
  double min_arcsec = 0.0;  ///< minor-axis FWHM [arcsec]
  double pa_deg = 0.0;      ///< position angle of the major axis, east of north [deg]

  bool valid() const {
    return std::isfinite(maj_arcsec) && std::isfinite(min_arcsec) && std::isfinite(pa_deg) &&
           maj_arcsec > 0.0 && min_arcsec > 0.0 && min_arcsec <= maj_arcsec * (1.0 + 1e-12);
  }
};

}  // namespace skerry
