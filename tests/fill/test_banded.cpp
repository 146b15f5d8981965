#include <catch2/catch.hpp>

#include <Eigen/Dense>
#include <random>

#include "kalends/banded.hpp"

using namespace kalends;

namespace {
Eigen::MatrixXd dense(const SymmetricBand& a) {
  Eigen::MatrixXd m = Eigen::MatrixXd::Zero(a.size(), a.size());
  for (int k = 0; k <= a.bandwidth(); ++k)
    for (int i = 0; i + k < a.size(); ++i) m(i + k, i) = m(i, i + k) = a.at(k, i);
  return m;
}
}  // namespace

TEST_CASE("band LDLt solve and band of the inverse match dense Eigen", "[fill][banded]") {
  std::mt19937 rng(7);
  std::uniform_real_distribution<double> u(0.0, 1.0);
  for (int b = 0; b <= 3; ++b)
    for (int n : {1, 2, 5, 40}) {
      INFO("bandwidth " << b << " n " << n);
      SymmetricBand a(n, b);
      for (int k = 1; k <= b; ++k)
        for (int i = 0; i + k < n; ++i) a.at(k, i) = u(rng) - 0.5;
      for (int i = 0; i < n; ++i) a.at(0, i) = 2.0 * b + 1.0 + u(rng);  // diagonally dominant
      const Eigen::MatrixXd m = dense(a);
      Eigen::VectorXd rhs = Eigen::VectorXd::Random(n);
      const Eigen::VectorXd expected = m.ldlt().solve(rhs);
      const Eigen::MatrixXd inverse = m.inverse();
      SymmetricBand f = a;
      REQUIRE(factorize_ldlt(f));
      std::vector<double> x(rhs.data(), rhs.data() + n);
      solve_ldlt(f, x);
      for (int i = 0; i < n; ++i) CHECK(x[i] == Approx(expected[i]).epsilon(1e-10));
      SymmetricBand s;
      band_of_inverse(f, s);
      for (int k = 0; k <= b; ++k)
        for (int i = 0; i + k < n; ++i) CHECK(s.at(k, i) == Approx(inverse(i + k, i)).epsilon(1e-9).margin(1e-12));
    }
}

TEST_CASE("difference penalty equals D^T D", "[fill][banded]") {
  for (int d = 1; d <= 3; ++d) {
    const int n = 9;
    Eigen::MatrixXd D = Eigen::MatrixXd::Identity(n, n);
    for (int k = 0; k < d; ++k) {  // D_d = D_1 applied d times
      const Eigen::MatrixXd first =
          D.bottomRows(D.rows() - 1) - D.topRows(D.rows() - 1);
      D = first;
    }
    const Eigen::MatrixXd expected = D.transpose() * D;
    const Eigen::MatrixXd got = dense(difference_penalty(n, d));
    CHECK((got - expected).cwiseAbs().maxCoeff() < 1e-12);
  }
}

TEST_CASE("a matrix that is not positive definite is reported", "[fill][banded]") {
  SymmetricBand a(3, 1);
  a.at(0, 0) = 1;
  a.at(0, 1) = 1;
  a.at(0, 2) = 1;
  a.at(1, 0) = 2;  // |off-diagonal| > diagonal
  CHECK_FALSE(factorize_ldlt(a));
}
