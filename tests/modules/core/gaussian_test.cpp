// Gaussian shape algebra checked against published worked values.
#include <gtest/gtest.h>

#include "skerry/constants.h"
#include "skerry/gaussian.h"

using namespace skerry;

// Source: REF-GAUSS-01, definition of the normal distribution.
TEST(Constants, FwhmSigma) {
  EXPECT_NEAR(kSigmaToFwhm, 2.3548200450309493, 1e-15);
  EXPECT_NEAR(kGaussAreaFactor, 1.1330900354567985, 1e-15);
}

// Source: Wild (1970, Aust. J. Phys. 23, 113), worked example REF-DECONV-01
// (intrinsic 10"x4" PA 30 convolved with a 6"x5" PA 60 beam).
TEST(Deconvolution, WildWorkedExample) {
  const Ellipse src{10.0, 4.0, 30.0}, beam{6.0, 5.0, 60.0};
  const Ellipse fit = convolve(src, beam);
  EXPECT_NEAR(fit.maj, 11.554340210156925, 1e-11);
  EXPECT_NEAR(fit.min, 6.595242399483949, 1e-11);
  EXPECT_NEAR(fit.pa_deg, 33.03781162576456, 1e-10);
  const Deconvolved d = deconvolve(fit, beam);
  EXPECT_TRUE(d.resolved_major && d.resolved_minor);
  EXPECT_NEAR(d.shape.maj, 10.0, 1e-11);
  EXPECT_NEAR(d.shape.min, 4.0, 1e-11);
  EXPECT_NEAR(d.shape.pa_deg, 30.0, 1e-10);
}

// Source: REF-DECONV-01 special cases (point source; one axis resolved; circular).
TEST(Deconvolution, SpecialCases) {
  const Ellipse beam{6.0, 5.0, 60.0};
  const Deconvolved point = deconvolve(beam, beam);
  EXPECT_FALSE(point.resolved_major);
  EXPECT_FALSE(point.resolved_minor);
  const Deconvolved one = deconvolve({7.0, 4.5, 60.0}, beam);
  EXPECT_NEAR(one.eig_major, 13.0, 1e-11);
  EXPECT_NEAR(one.eig_minor, -4.75, 1e-11);
  EXPECT_TRUE(one.resolved_major);
  EXPECT_FALSE(one.resolved_minor);
  const Deconvolved circ = deconvolve({10.0, 10.0, 0.0}, {6.0, 6.0, 0.0});
  EXPECT_NEAR(circ.shape.maj, 8.0, 1e-12);
  EXPECT_NEAR(circ.shape.min, 8.0, 1e-12);
}

// Source: REF-CONV-02 worked example (kernel from 6"x4" PA 30 to 10"x8" PA 0).
TEST(ConvolutionKernel, WorkedExample) {
  const Ellipse a{6.0, 4.0, 30.0}, b{10.0, 8.0, 0.0};
  auto k = convolution_kernel(a, b);
  ASSERT_TRUE(k.has_value());
  EXPECT_NEAR(k->maj, 8.462889539147566, 1e-10);
  EXPECT_NEAR(k->min, 6.354486654969596, 1e-10);
  EXPECT_NEAR(k->pa_deg, 163.16475174584244, 1e-9);
  const Ellipse back = convolve(a, *k);
  EXPECT_NEAR(back.maj, 10.0, 1e-11);
  EXPECT_NEAR(back.min, 8.0, 1e-11);
  EXPECT_NEAR(std::fmod(back.pa_deg + 90.0, 180.0) - 90.0, 0.0, 1e-9);
  // Unreachable targets (REF-CONV-02).
  EXPECT_FALSE(convolution_kernel(a, {6.0, 6.0, 0.0}, 1e-6).has_value());
  EXPECT_FALSE(convolution_kernel({6.0, 4.0, 90.0}, {7.0, 5.0, 0.0}).has_value());
}
