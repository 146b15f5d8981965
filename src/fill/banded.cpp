#include "kalends/banded.hpp"

#include <stdexcept>

#include "fill/banded_kernels.hpp"

namespace kalends {

void SymmetricBand::resize(int n, int bandwidth) {
  n_ = n;
  b_ = bandwidth;
  data_.assign(std::size_t(n) * (bandwidth + 1), 0.0);
}

bool factorize_ldlt(SymmetricBand& a) {
  switch (a.bandwidth()) {
    case 0: return detail::factorize_ldlt<0>(a);
    case 1: return detail::factorize_ldlt<1>(a);
    case 2: return detail::factorize_ldlt<2>(a);
    case 3: return detail::factorize_ldlt<3>(a);
  }
  throw std::invalid_argument("bandwidth above 3 is not supported");
}

void solve_ldlt(const SymmetricBand& f, std::span<double> x) {
  switch (f.bandwidth()) {
    case 0: return detail::solve_ldlt<0>(f, x);
    case 1: return detail::solve_ldlt<1>(f, x);
    case 2: return detail::solve_ldlt<2>(f, x);
    case 3: return detail::solve_ldlt<3>(f, x);
  }
  throw std::invalid_argument("bandwidth above 3 is not supported");
}

void band_of_inverse(const SymmetricBand& f, SymmetricBand& s) {
  switch (f.bandwidth()) {
    case 0: return detail::band_of_inverse<0>(f, s);
    case 1: return detail::band_of_inverse<1>(f, s);
    case 2: return detail::band_of_inverse<2>(f, s);
    case 3: return detail::band_of_inverse<3>(f, s);
  }
  throw std::invalid_argument("bandwidth above 3 is not supported");
}

SymmetricBand difference_penalty(int n, int order) {
  if (order < 1 || order > 3) throw std::invalid_argument("difference order must be 1, 2 or 3");
  // Rows of D_d: binomial coefficients with alternating signs.
  static constexpr double coefficients[4][4] = {
      {1, 0, 0, 0}, {-1, 1, 0, 0}, {1, -2, 1, 0}, {-1, 3, -3, 1}};
  const double* c = coefficients[order];
  SymmetricBand p(n, order);
  for (int r = 0; r + order < n; ++r)
    for (int a = 0; a <= order; ++a)
      for (int b = 0; b <= a; ++b) p.at(a - b, r + b) += c[a] * c[b];
  return p;
}

}  // namespace kalends
