// Reference check of the Levenberg-Marquardt solver against the NIST Statistical
// Reference Datasets, nonlinear regression section (NIST Information Technology
// Laboratory, StRD; files copied unchanged into tests/data/nist-strd with their
// headers). Scoring as in StRD practice (common practice): the log relative error
// LRE = -log10(|estimate - certified| / |certified|) of every parameter, of every
// standard deviation and of the residual sum of squares must be >= 6 from both
// starting points. Standard deviations follow NIST's definition: unweighted
// residuals, covariance (J^T J)^-1 scaled by s^2 = RSS / (n - p).
#include <gtest/gtest.h>

#include <cmath>
#include <fstream>
#include <functional>
#include <sstream>
#include <string>
#include <vector>

#include "skerry/levmar.h"

namespace {

struct StrdProblem {
  std::string name;
  std::vector<double> start1, start2, certified, certified_sd;
  double certified_rss = 0.0;
  std::vector<double> x, y;
};

StrdProblem read_strd(const std::string& name) {
  StrdProblem p;
  p.name = name;
  std::ifstream in(std::string(SKERRY_TEST_DATA_DIR) + "/nist-strd/" + name + ".dat");
  EXPECT_TRUE(in.good()) << "cannot open " << name;
  std::string line;
  std::vector<std::string> lines;
  while (std::getline(in, line)) lines.push_back(line);
  // Parameter lines: "  b1 =   start1   start2   certified   certified_sd".
  const std::string rss_key = "Residual Sum of Squares:";
  std::size_t data_start = 0;
  for (std::size_t i = 0; i < lines.size(); ++i) {
    const std::string& l = lines[i];
    const std::size_t b = l.find_first_not_of(' ');
    const std::size_t eq = l.find('=');
    if (b != std::string::npos && l[b] == 'b' && eq != std::string::npos && eq > b + 1 &&
        l.find_first_not_of("0123456789 ", b + 1) == eq) {
      std::istringstream ss(l.substr(eq + 1));
      double v[4];
      if (ss >> v[0] >> v[1] >> v[2] >> v[3]) {
        p.start1.push_back(v[0]);
        p.start2.push_back(v[1]);
        p.certified.push_back(v[2]);
        p.certified_sd.push_back(v[3]);
      }
    } else if (l.find(rss_key) != std::string::npos) {
      p.certified_rss = std::stod(l.substr(l.find(rss_key) + rss_key.size()));
    }
    if (lines[i].rfind("Data:", 0) == 0) data_start = i + 1;  // the last "Data:" line
  }
  for (std::size_t i = data_start; i < lines.size(); ++i) {
    std::istringstream ss(lines[i]);
    double yv, xv;
    if (ss >> yv >> xv) {
      p.y.push_back(yv);
      p.x.push_back(xv);
    }
  }
  return p;
}

// Model value and gradient d f / d b at x (analytic, from the model line in each file).
using Model = std::function<double(const Eigen::VectorXd& b, double x, double* grad)>;

Model model_for(const std::string& name) {
  if (name == "Misra1a" || name == "BoxBOD") {
    // y = b1 (1 - exp(-b2 x))
    return [](const Eigen::VectorXd& b, double x, double* g) {
      const double e = std::exp(-b(1) * x);
      if (g) {
        g[0] = 1.0 - e;
        g[1] = b(0) * x * e;
      }
      return b(0) * (1.0 - e);
    };
  }
  if (name == "Eckerle4") {
    // y = (b1 / b2) exp(-0.5 ((x - b3) / b2)^2)
    return [](const Eigen::VectorXd& b, double x, double* g) {
      const double u = (x - b(2)) / b(1);
      const double e = std::exp(-0.5 * u * u);
      const double f = b(0) / b(1) * e;
      if (g) {
        g[0] = e / b(1);
        g[1] = f * (u * u - 1.0) / b(1);
        g[2] = f * u / b(1);
      }
      return f;
    };
  }
  if (name == "MGH09") {
    // y = b1 (x^2 + x b2) / (x^2 + x b3 + b4)
    return [](const Eigen::VectorXd& b, double x, double* g) {
      const double num = x * x + x * b(1), den = x * x + x * b(2) + b(3);
      const double f = b(0) * num / den;
      if (g) {
        g[0] = num / den;
        g[1] = b(0) * x / den;
        g[2] = -f * x / den;
        g[3] = -f / den;
      }
      return f;
    };
  }
  if (name == "Thurber") {
    // y = (b1 + b2 x + b3 x^2 + b4 x^3) / (1 + b5 x + b6 x^2 + b7 x^3)
    return [](const Eigen::VectorXd& b, double x, double* g) {
      const double x2 = x * x, x3 = x2 * x;
      const double num = b(0) + b(1) * x + b(2) * x2 + b(3) * x3;
      const double den = 1.0 + b(4) * x + b(5) * x2 + b(6) * x3;
      const double f = num / den;
      if (g) {
        g[0] = 1.0 / den;
        g[1] = x / den;
        g[2] = x2 / den;
        g[3] = x3 / den;
        g[4] = -f * x / den;
        g[5] = -f * x2 / den;
        g[6] = -f * x3 / den;
      }
      return f;
    };
  }
  // Gauss1-3: y = b1 exp(-b2 x) + b3 exp(-(x - b4)^2 / b5^2) + b6 exp(-(x - b7)^2 / b8^2)
  return [](const Eigen::VectorXd& b, double x, double* g) {
    const double e0 = std::exp(-b(1) * x);
    const double u1 = (x - b(3)) / b(4), u2 = (x - b(6)) / b(7);
    const double e1 = std::exp(-u1 * u1), e2 = std::exp(-u2 * u2);
    if (g) {
      g[0] = e0;
      g[1] = -b(0) * x * e0;
      g[2] = e1;
      g[3] = b(2) * e1 * 2.0 * u1 / b(4);
      g[4] = b(2) * e1 * 2.0 * u1 * u1 / b(4);
      g[5] = e2;
      g[6] = b(5) * e2 * 2.0 * u2 / b(7);
      g[7] = b(5) * e2 * 2.0 * u2 * u2 / b(7);
    }
    return b(0) * e0 + b(2) * e1 + b(5) * e2;
  };
}

double lre(double est, double cert) {
  const double rel = std::abs(est - cert) / std::abs(cert);
  return rel == 0.0 ? 16.0 : -std::log10(rel);
}

void check_problem(const std::string& name) {
  const StrdProblem prob = read_strd(name);
  const int n = static_cast<int>(prob.certified.size());
  const int m = static_cast<int>(prob.x.size());
  // Parameter and observation counts stated in each file's header.
  const int want_n = name == "Misra1a" || name == "BoxBOD" ? 2
                     : name == "Eckerle4"                  ? 3
                     : name == "MGH09"                     ? 4
                     : name == "Thurber"                   ? 7
                                                           : 8;
  const int want_m = name == "Misra1a" ? 14 : name == "BoxBOD" ? 6 : name == "Eckerle4" ? 35
                     : name == "MGH09" ? 11 : name == "Thurber" ? 37 : 250;
  ASSERT_EQ(n, want_n);
  ASSERT_EQ(m, want_m);
  ASSERT_GT(m, n);
  const Model model = model_for(name);
  skerry::LmFunctor f = [&](const Eigen::VectorXd& b, Eigen::VectorXd& r, Eigen::MatrixXd* J) {
    std::vector<double> g(n);
    for (int i = 0; i < m; ++i) {
      const double v = model(b, prob.x[i], J ? g.data() : nullptr);
      r(i) = prob.y[i] - v;
      if (J)
        for (int j = 0; j < n; ++j) (*J)(i, j) = -g[j];
    }
    return true;
  };
  skerry::LmOptions opt;
  opt.max_iterations = 5000;
  opt.step_rel_tol = 1e-14;
  opt.chi2_rel_tol = 1e-15;
  opt.gradient_tol = 1e-15;
  skerry::LevenbergMarquardt lm(opt);
  for (int start = 1; start <= 2; ++start) {
    const auto& s = start == 1 ? prob.start1 : prob.start2;
    const Eigen::VectorXd p0 = Eigen::Map<const Eigen::VectorXd>(s.data(), n);
    const skerry::LmResult res = lm.solve(f, p0, m);
    SCOPED_TRACE(name + " start " + std::to_string(start) + " status " +
                 std::string(skerry::to_string(res.status)) + " iterations " +
                 std::to_string(res.iterations));
    EXPECT_TRUE(skerry::lm_converged(res.status));
    EXPECT_GE(lre(res.chi2, prob.certified_rss), 6.0)
        << "RSS " << res.chi2 << " certified " << prob.certified_rss;
    Eigen::MatrixXd cov;
    ASSERT_TRUE(skerry::lm_covariance(res.jacobian, cov));
    const double s2 = res.chi2 / (m - n);  // NIST: residual variance RSS / (n - p)
    for (int j = 0; j < n; ++j) {
      EXPECT_GE(lre(res.params(j), prob.certified[j]), 6.0)
          << "b" << j + 1 << " = " << res.params(j) << " certified " << prob.certified[j];
      const double sd = std::sqrt(s2 * cov(j, j));
      EXPECT_GE(lre(sd, prob.certified_sd[j]), 6.0)
          << "sd(b" << j + 1 << ") = " << sd << " certified " << prob.certified_sd[j];
    }
  }
}

// Lower difficulty (NIST classification in each file's header).
TEST(NistStrd, Misra1a) { check_problem("Misra1a"); }
TEST(NistStrd, Gauss1) { check_problem("Gauss1"); }
TEST(NistStrd, Gauss2) { check_problem("Gauss2"); }
// Average difficulty.
TEST(NistStrd, Gauss3) { check_problem("Gauss3"); }
// Higher difficulty.
TEST(NistStrd, BoxBOD) { check_problem("BoxBOD"); }
TEST(NistStrd, Eckerle4) { check_problem("Eckerle4"); }
TEST(NistStrd, MGH09) { check_problem("MGH09"); }
TEST(NistStrd, Thurber) { check_problem("Thurber"); }

// Status strings are part of the interface users read (Ceres-style string forms).
TEST(LevenbergMarquardt, StatusNames) {
  EXPECT_EQ(skerry::to_string(skerry::LmStatus::kConvergedStep), "converged_step");
  EXPECT_EQ(skerry::to_string(skerry::LmStatus::kMaxIterations), "max_iterations");
  EXPECT_EQ(skerry::to_string(skerry::LmStatus::kBadInput), "bad_input");
}

// Bounds by projection: minimising (p - 3)^2 with p <= 1 must end on the bound
// with the bound flagged (elementary calculus: the constrained minimum of a
// convex function over an interval is the nearest end point).
TEST(LevenbergMarquardt, BoundIsRespected) {
  skerry::LmFunctor f = [](const Eigen::VectorXd& p, Eigen::VectorXd& r, Eigen::MatrixXd* J) {
    r(0) = p(0) - 3.0;
    r(1) = p(1) + 2.0;
    if (J) *J = Eigen::MatrixXd::Identity(2, 2);
    return true;
  };
  skerry::LevenbergMarquardt lm;
  lm.set_bounds(Eigen::Vector2d(-10.0, -10.0), Eigen::Vector2d(1.0, 10.0));
  const auto res = lm.solve(f, Eigen::Vector2d(0.0, 0.0), 2);
  EXPECT_TRUE(skerry::lm_converged(res.status)) << skerry::to_string(res.status);
  EXPECT_DOUBLE_EQ(res.params(0), 1.0);
  EXPECT_NEAR(res.params(1), -2.0, 1e-9);
  EXPECT_TRUE(res.at_bound(0));
  EXPECT_FALSE(res.at_bound(1));
}

TEST(LevenbergMarquardt, BadInputIsReported) {
  skerry::LmFunctor f = [](const Eigen::VectorXd&, Eigen::VectorXd& r, Eigen::MatrixXd* J) {
    r.setZero();
    if (J) J->setZero();
    return true;
  };
  skerry::LevenbergMarquardt lm;
  EXPECT_EQ(lm.solve(f, Eigen::Vector3d(0, 0, 0), 2).status, skerry::LmStatus::kBadInput);
  lm.set_bounds(Eigen::Vector2d(1.0, 0.0), Eigen::Vector2d(0.0, 1.0));  // lower > upper
  EXPECT_EQ(lm.solve(f, Eigen::Vector2d(0, 0), 4).status, skerry::LmStatus::kBadInput);
}

}  // namespace
