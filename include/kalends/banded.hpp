// Symmetric positive definite banded systems: LDL^T factorisation, solves, and the entries of
// the inverse inside the band (Hutchinson & de Hoog 1985).
#pragma once

#include <span>
#include <vector>

namespace kalends {

/// A symmetric band matrix of half-bandwidth b stored by diagonals:
/// diagonal(k)[i] = A(i + k, i), k = 0..b, i = 0..n-1-k (entries past the end unused).
class SymmetricBand {
 public:
  SymmetricBand() = default;
  SymmetricBand(int n, int bandwidth) { resize(n, bandwidth); }
  void resize(int n, int bandwidth);
  int size() const noexcept { return n_; }
  int bandwidth() const noexcept { return b_; }
  double& at(int k, int i) noexcept { return data_[std::size_t(k) * n_ + i]; }
  double at(int k, int i) const noexcept { return data_[std::size_t(k) * n_ + i]; }
  std::span<double> diagonal(int k) { return {data_.data() + std::size_t(k) * n_, std::size_t(n_)}; }

 private:
  int n_ = 0, b_ = 0;
  std::vector<double> data_;
};

/// A = L D L^T with L unit lower triangular, stored in place of A: at(0, i) = D(i),
/// at(k, i) = L(i + k, i). Returns false if a pivot is not positive (not SPD).
bool factorize_ldlt(SymmetricBand& a);

/// Solves L D L^T x = rhs in place.
void solve_ldlt(const SymmetricBand& factor, std::span<double> x);

/// The entries of A^-1 within the band, from the factor, in O(n b^2): `inverse` receives
/// inverse.at(k, i) = (A^-1)(i + k, i). (Hutchinson & de Hoog 1985, Numer. Math. 47:99, eq. 2.4)
void band_of_inverse(const SymmetricBand& factor, SymmetricBand& inverse);

/// The penalty D_d^T D_d of the d-th order difference matrix D_d for a series of n (d = 1..3),
/// as a band of half-bandwidth d.
SymmetricBand difference_penalty(int n, int order);

}  // namespace kalends
