#pragma once
/// Sky geometry: the pixel <-> sky interface that stages compute with, the local
/// geometry of an image at a pixel, and great-circle separations.
///
/// Modules never parse headers: they receive a PixelSky (pipeline/io builds one
/// from a FITS header through WCSLIB). All positions are ICRS degrees; pixels are
/// 0-based (see constants.h).
#include <Eigen/Core>
#include <optional>

namespace skerry {

class PixelSky {
 public:
  virtual ~PixelSky() = default;
  /// 0-based pixel -> ICRS (deg). False where the pixel has no sky position.
  virtual bool pix_to_sky(double x, double y, double& ra_deg, double& dec_deg) const = 0;
  /// ICRS (deg) -> 0-based pixel. False where the position is outside the projection.
  virtual bool sky_to_pix(double ra_deg, double dec_deg, double& x, double& y) const = 0;
};

/// Standard (gnomonic) coordinates of (ra, dec) about the tangent point (ra0, dec0):
/// xi towards east, eta towards north, radians (Calabretta & Greisen 2002, TAN).
/// False when the point is 90 deg or more from the tangent point.
bool gnomonic_offset(double ra0_deg, double dec0_deg, double ra_deg, double dec_deg,
                     double& xi_rad, double& eta_rad);
/// Inverse of gnomonic_offset.
void gnomonic_inverse(double ra0_deg, double dec0_deg, double xi_rad, double eta_rad,
                      double& ra_deg, double& dec_deg);

/// Geometry of an image around one pixel.
struct LocalGeometry {
  /// d(east, north)/d(x, y) [arcsec per pixel]: column 0 is the sky step of one
  /// pixel in +x, column 1 of one pixel in +y. Parity and rotation included.
  Eigen::Matrix2d jac_arcsec_per_pix = Eigen::Matrix2d::Identity();
  double pixel_area_arcsec2 = 0.0;  ///< |det J| [arcsec^2]
  /// Position angle (east of north) of the image's +y direction [deg, 0..360).
  double plus_y_pa_deg = 0.0;
  /// True where east lies towards -x for +y north-ish (the usual parity, det J < 0).
  bool usual_parity = true;

  /// Sky PA (east of north, [0, 360)) of a pixel-frame direction (dx, dy).
  double pa_of_pixel_direction_deg(double dx, double dy) const;
  /// Pixel-frame covariance [pix^2] -> sky (east, north) covariance [arcsec^2]: J C J^T.
  Eigen::Matrix2d pixel_cov_to_sky(const Eigen::Matrix2d& c_pix) const;
  /// Sky covariance [arcsec^2] -> pixel-frame covariance [pix^2]: J^-1 C J^-T.
  Eigen::Matrix2d sky_cov_to_pixel(const Eigen::Matrix2d& c_sky) const;
};

/// Local geometry by central differences of half a pixel through the gnomonic
/// plane about the pixel's own position (exact to second order in the step).
std::optional<LocalGeometry> local_geometry(const PixelSky& wcs, double x, double y,
                                            double step_pix = 0.5);

/// Great-circle separation [deg] by Vincenty's formula for the sphere, accurate at
/// every angle (Vincenty 1975, Survey Review 23, 88; REF-SEP-01).
double separation_deg(double ra1_deg, double dec1_deg, double ra2_deg, double dec2_deg);
/// Position angle of point 2 seen from point 1, east of north, [0, 360) deg.
double position_angle_deg(double ra1_deg, double dec1_deg, double ra2_deg, double dec2_deg);
/// Unit vector of (ra, dec).
Eigen::Vector3d unit_vector(double ra_deg, double dec_deg);
/// (ra, dec) [deg] of a non-zero vector (need not be unit), ra in [0, 360).
void radec_of_vector(const Eigen::Vector3d& v, double& ra_deg, double& dec_deg);

}  // namespace skerry
