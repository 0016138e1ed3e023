#pragma once
/// The WCSLIB adapter: a PixelSky built from FITS header text, and header text
/// built from a simple description (for the simulator and derived maps).
#include <memory>
#include <string>

#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry {

/// Celestial WCS of a header (all 80-char cards concatenated). Throws
/// std::invalid_argument with a one-line reason when there is no usable celestial
/// WCS. Frames: ICRS, FK5 (converted to ICRS with ERFA), Galactic (converted);
/// FK4 refused. Thread-safe.
std::shared_ptr<const PixelSky> wcs_from_header(const std::string& header_cards,
                                                std::string* frame_out = nullptr);

/// A simple celestial grid description.
struct GridSpec {
  long nx = 0, ny = 0;
  std::string projection = "SIN";  ///< any WCSLIB code: SIN, TAN, ARC, ZEA, CAR, AZP, ...
  std::string frame = "ICRS";      ///< "ICRS", "FK5" or "GALACTIC"
  double crval1_deg = 0.0, crval2_deg = 0.0;  ///< reference sky position (lon, lat)
  double crpix1 = 0.0, crpix2 = 0.0;          ///< reference pixel, FITS 1-based
  double cdelt1_deg = 0.0, cdelt2_deg = 0.0;  ///< pixel steps (cdelt1 < 0: east left)
  double rotation_deg = 0.0;                  ///< PC rotation (CROTA2 sense)
  Beam beam;                                  ///< written as BMAJ/BMIN/BPA when valid
  double freq_hz = 0.0;                       ///< written as a degenerate FREQ axis when > 0
};

/// Header cards for a 2-D image on this grid (NAXIS, WCS, beam, frequency).
std::string header_for_grid(const GridSpec& grid);

}  // namespace skerry
