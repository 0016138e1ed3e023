#pragma once
/// The WCSLIB adapter: a PixelSky built from FITS header text, and header text
/// built from a simple description (for the simulator and derived maps).
///
/// Conventions implemented here, and only here:
///  - Pixel origin: the PixelSky interface takes 0-based pixels (x along FITS
///    axis 1); WCSLIB is called with FITS 1-based pixels p = x + 1.
///  - Frames (FITS WCS Paper II, Calabretta & Greisen 2002, sect. 3.1): RADESYS
///    names the frame; without it, ICRS when there is no EQUINOX, FK4 when
///    EQUINOX < 1984 (refused), else FK5. FK5 (any equinox: IAU 1976 precession to
///    J2000, then ERFA eraFk5hip's frame rotation) and Galactic (Murray 1989's
///    axes referred to FK5 J2000, then the same FK5 -> ICRS rotation; ~25 mas from
///    ERFA eraG2icrs's Hipparcos reading, see wcs.cpp) are converted to ICRS; FK4,
///    GAPPT, ecliptic and other frames are refused with a one-line reason.
#include <cstddef>
#include <memory>
#include <optional>
#include <string>
#include <utility>
#include <vector>

#include "skerry/image.h"
#include "skerry/sky.h"

namespace skerry {

/// Celestial WCS of a header (all 80-char cards concatenated). Throws
/// std::invalid_argument with a one-line reason when there is no usable celestial
/// WCS on image axes 1 and 2. Frames: ICRS, FK5 (converted to ICRS with ERFA),
/// Galactic (converted); FK4 refused. Thread-safe (calls may run concurrently).
/// `frame_out` gets "ICRS", "FK5" or "GALACTIC"; `cards2d_out` gets the celestial
/// WCS alone as header cards of a 2-D image (WCSLIB's wcshdo, 17 digits).
std::shared_ptr<const PixelSky> wcs_from_header(const std::string& header_cards,
                                                std::string* frame_out = nullptr,
                                                std::string* cards2d_out = nullptr);

/// A view of a PixelSky made by wcs_from_header whose (ra, dec) are the
/// longitude and latitude of the image's own celestial frame (e.g. Galactic l, b),
/// without the conversion to ICRS. nullptr for other PixelSky implementations.
/// Throws std::runtime_error when WCSLIB cannot copy the coordinate system.
std::shared_ptr<const PixelSky> native_frame_sky(const PixelSky& sky);

/// The restoring beam of an image with its PA east of ICRS north, at any pixel.
///
/// BPA in a header is measured from the north of the image's own frame (FITS beam
/// keywords, REF-FITS-03; common practice). Catalogue angles are east of ICRS
/// north, so for a Galactic image the beam is turned, at each position, by the
/// ICRS position angle of Galactic north there: that direction is the +latitude
/// direction of the native frame (native_frame_sky) in the pixel frame, and its
/// ICRS PA comes from the real WCS. Other frames, and beams whose PA is already
/// east of ICRS north (e.g. given by the user): the beam as it is.
class SkyBeam {
 public:
  /// `pa_in_image_frame`: the beam's PA is measured from the north of `frame`
  /// ("ICRS", "FK5" or "GALACTIC", as wcs_from_header names it).
  SkyBeam(std::shared_ptr<const PixelSky> wcs, const std::string& frame, const Beam& beam,
          bool pa_in_image_frame);
  /// The beam with its PA east of ICRS north at 0-based pixel (x, y); nullopt
  /// where the pixel has no sky position.
  std::optional<Beam> at(double x, double y) const;

 private:
  std::shared_ptr<const PixelSky> wcs_;
  std::shared_ptr<const PixelSky> native_;  ///< set only when the beam must be turned
  Beam beam_;
};

/// Bulk conversions: n points; NaN outputs where a point has no position. Uses one
/// WCSLIB call per chunk for a PixelSky made by wcs_from_header (falls back to
/// per-point calls for other PixelSky implementations).
void pix_to_sky_many(const PixelSky& sky, std::size_t n, const double* x, const double* y,
                     double* ra_deg, double* dec_deg);
void sky_to_pix_many(const PixelSky& sky, std::size_t n, const double* ra_deg,
                     const double* dec_deg, double* x, double* y);

/// A simple celestial grid description.
struct GridSpec {
  long nx = 0, ny = 0;
  std::string projection = "SIN";  ///< any WCSLIB code: SIN, TAN, ARC, ZEA, CAR, AZP, ...
  std::string frame = "ICRS";      ///< "ICRS", "FK5" (J2000) or "GALACTIC"
  double crval1_deg = 0.0, crval2_deg = 0.0;  ///< reference sky position (lon, lat)
  double crpix1 = 0.0, crpix2 = 0.0;          ///< reference pixel, FITS 1-based
  double cdelt1_deg = 0.0, cdelt2_deg = 0.0;  ///< pixel steps (cdelt1 < 0: east left)
  double rotation_deg = 0.0;                  ///< PC rotation (CROTA2 sense)
  /// Projection parameters PV2_m as (m, value), e.g. {{1, 45.0}} for a conic's
  /// theta_a or AZP's mu; most projections need none.
  std::vector<std::pair<int, double>> pv2;
  Beam beam;                                  ///< written as BMAJ/BMIN/BPA when valid
  /// Observing frequency [Hz]; written as the keyword FREQ (in Hz) when > 0. A
  /// 2-D image gets no degenerate spectral axis; read_sky_image reads FREQ back.
  double freq_hz = 0.0;
};

/// Header cards for a 2-D image on this grid (NAXIS, NAXIS1/2, CTYPE, CRVAL, CRPIX,
/// CDELT, PC from the rotation (Paper II eq. 189), CUNIT, RADESYS/EQUINOX,
/// BMAJ/BMIN/BPA [deg], FREQ [Hz]). No END card. Throws std::invalid_argument for
/// an unusable description (zero steps, unknown frame, bad projection code).
std::string header_for_grid(const GridSpec& grid);

/// One 80-character FITS card "KEY     = value / comment" (value already
/// FITS-formatted, e.g. "'text'" or "1.5"); helper for writers.
std::string fits_card(const std::string& key, const std::string& value,
                      const std::string& comment = "");
/// A real number as a FITS value: the shortest decimal that reads back exactly.
std::string fits_real(double v);
/// A string as a FITS value: quoted, inner quotes doubled.
std::string fits_string(const std::string& s);

}  // namespace skerry
