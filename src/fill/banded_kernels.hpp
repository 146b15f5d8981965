// Band LDL^T kernels, templated on the half-bandwidth so the inner loops unroll. The public
// functions in banded.cpp dispatch here; the Whittaker smoother calls these directly.
#pragma once

#include <algorithm>

#include "kalends/banded.hpp"

namespace kalends::detail {

template <int B>
bool factorize_ldlt(SymmetricBand& a) {
  const int n = a.size();
  for (int j = 0; j < n; ++j) {
    // D_j = A(j,j) - sum_k L(j,k)^2 D_k
    double d = a.at(0, j);
    for (int k = std::max(0, j - B); k < j; ++k) {
      const double l = a.at(j - k, k);
      d -= l * l * a.at(0, k);
    }
    if (!(d > 0.0)) return false;
    a.at(0, j) = d;
    for (int i = j + 1; i <= std::min(n - 1, j + B); ++i) {
      // L(i,j) = (A(i,j) - sum_{k<j} L(i,k) L(j,k) D_k) / D_j
      double s = a.at(i - j, j);
      for (int k = std::max(0, i - B); k < j; ++k) s -= a.at(i - k, k) * a.at(j - k, k) * a.at(0, k);
      a.at(i - j, j) = s / d;
    }
  }
  return true;
}

template <int B, typename Vector>
void solve_ldlt(const SymmetricBand& f, Vector& x) {
  const int n = f.size();
  for (int i = 0; i < n; ++i)
    for (int k = std::max(0, i - B); k < i; ++k) x[i] -= f.at(i - k, k) * x[k];
  for (int i = 0; i < n; ++i) x[i] /= f.at(0, i);
  for (int i = n - 1; i >= 0; --i)
    for (int k = i + 1; k <= std::min(n - 1, i + B); ++k) x[i] -= f.at(k - i, i) * x[k];
}

// Hutchinson & de Hoog (1985), eq. (2.4), for S = A^-1 = (L D L^T)^-1:
//   S(j,i) = -sum_{k=i+1}^{i+B} L(k,i) S(k,j)       for j = i+1 .. i+B
//   S(i,i) = 1/D_i - sum_{k=i+1}^{i+B} L(k,i) S(k,i)
// run from the last row up; every S(k,j) needed lies inside the band already computed.
template <int B>
void band_of_inverse(const SymmetricBand& f, SymmetricBand& s) {
  const int n = f.size();
  s.resize(n, B);
  auto sigma = [&](int r, int c) { return r >= c ? s.at(r - c, c) : s.at(c - r, r); };
  for (int i = n - 1; i >= 0; --i) {
    const int last = std::min(n - 1, i + B);
    for (int j = last; j > i; --j) {
      double v = 0.0;
      for (int k = i + 1; k <= last; ++k) v -= f.at(k - i, i) * sigma(k, j);
      s.at(j - i, i) = v;
    }
    double v = 1.0 / f.at(0, i);
    for (int k = i + 1; k <= last; ++k) v -= f.at(k - i, i) * s.at(k - i, i);
    s.at(0, i) = v;
  }
}

}  // namespace kalends::detail
