// Penalised least squares on a regular 1-, 2- or 3-D grid, solved in the discrete cosine
// transform domain.
//
// [G10] Garcia, D. (2010), Robust smoothing of gridded data in one and higher dimensions with
//       missing values, Comput. Stat. Data Anal. 54:1167-1178.
// [W12] Wang, G., Garcia, D., Liu, Y., de Jeu, R. & Dolman, A.J. (2012), A three-dimensional
//       gap filling method for large geophysical datasets: application to global satellite
//       soil moisture observations, Environ. Model. Softw. 30:139-142 (pages from memory).
// [S99] Strang, G. (1999), The discrete cosine transform, SIAM Review 41:135-147 (the DCT-II
//       diagonalises the second-difference matrix with reflecting ends).
// [FJ05] Frigo, M. & Johnson, S.G. (2005), The design and implementation of FFTW3, Proc. IEEE
//       93:216-231 (REDFT10 = DCT-II, REDFT01 = DCT-III, both unnormalised).
// [HS52] Hestenes, M.R. & Stiefel, E. (1952), Methods of conjugate gradients for solving linear
//       systems, J. Res. Natl. Bur. Stand. 49:409-436.
// [B77] Brandt, A. (1977), Multi-level adaptive solutions to boundary-value problems, Math.
//       Comput. 31:333-390 (nested iteration: a coarse grid's solution as the fine grid's start;
//       pages from memory).
// [BHM00] Briggs, W.L., Henson, V.E. & McCormick, S.F. (2000), A Multigrid Tutorial, 2nd ed.,
//       SIAM (ch. 3: restriction by full weighting or means, bilinear interpolation).
// [M80] Makhoul, J. (1980), A fast cosine transform in one and two dimensions, IEEE Trans.
//       Acoust. Speech Signal Process. 28:27-34 (the DCT-II of even length N as a real FFT of
//       the reordered sequence v(n) = x(2n), v(N-1-n) = x(2n+1), times exp(-i pi k / 2N); pages
//       from memory).
//
// The problem, on an array of shape n0 x n1 x n2 (axes 0 and 1 are space, axis 2 is time or
// season; a smaller rank uses shape 1 on the leading axes):
//
//   minimise  sum_i w_i (y_i - z_i)^2 + s_space ||(L_0 + L_1) z||^2 + s_time ||L_2 z||^2
//
// with L_k the second-difference matrix along axis k with reflecting ends (rows [-1 1 ...],
// [1 -2 1], ..., [... 1 -1]). [G10] uses one smoothing s for the sum of all axes; we give space
// and time their own, since they are different physical quantities. Every L_k is diagonalised
// by the DCT-II [S99] with eigenvalues lambda_k(j) = -2 + 2 cos(pi j / n_k), j = 0..n_k-1 (the
// Lambda of [G10], there summed over all dimensions), so the penalty matrix
//   P = s_space (L_0 + L_1)^2 + s_time L_2^2
// is diagonal in the DCT domain: P = C^T diag(s_space (lambda_0 + lambda_1)^2 + s_time lambda_2^2) C.
// With all weights 1 the solution is z = C^T Gamma C y, Gamma = 1 / (1 + p) ([G10]); with
// missing values (w_i = 0) [G10] iterates z <- C^T Gamma C (W (y - z) + z).
//
// We solve the same normal equations (W + P) z = W y by preconditioned conjugate gradients
// [HS52], in a mixed domain: the DCT-II over the two space axes only (C_s), where P becomes one
// pentadiagonal matrix along time per spatial frequency (a, b),
//   P_ab = s_space (lambda_0(a) + lambda_1(b))^2 I + s_time L_2^2.
// The preconditioner is (diag(wbar) + P_ab)^-1 per frequency, wbar(t) the mean weight of slot t
// over the block, solved by a banded LDL^T. It is exact for the block mean, so dates with no data
// at all (winters, wholly cloudy dates), which made [G10]'s (omega I + P)^-1 converge slowly,
// cost few iterations: on the Alaska masked50 block the four solves of a fill took 142, 145,
// 81 and 114 iterations with (omega I + P)^-1 and 36, 68, 11 and 50 with this one. Time is not
// transformed, so it needs no padding. Two 2-D transforms per iteration (the residual is kept
// as a spectrum, the direction in both domains), of the slots with data only: where no pixel of
// a slot has weight, W is 0 and the solve never needs that slot in space, so its parts of the
// vectors stay in the orthonormal space-DCT domain (dot products are equal in both) and are
// transformed back once, at the end. On a summer-only stack on an all-year grid (Alaska: 48 of 138 slots with data)
// this cuts the transforms by about 3.
#pragma once

#include <array>
#include <cstddef>
#include <map>
#include <memory>
#include <mutex>
#include <span>
#include <tuple>
#include <type_traits>
#include <string>
#include <vector>

namespace kalends::detail {

using Shape3 = std::array<int, 3>;

/// How plans are made. `measure` times candidate algorithms (FFTW_MEASURE): slower to plan,
/// up to about 4x faster to run on shapes such as 256 x 256 x 48. Its results, FFTW's
/// "wisdom", are read from and added to `wisdom_file` (when not empty), so each shape is timed
/// once per machine rather than once per run.
struct DctPlanning {
  bool measure = false;
  std::string wisdom_file;
};

/// The default wisdom file: $KALENDS_CACHE_DIR, else $XDG_CACHE_HOME/kalends (absolute), else
/// $HOME/.cache/kalends, then /fftw-wisdom; empty when none of them is set.
std::string default_wisdom_file();

/// Consecutive indices [first, first + count) of axis 2.
struct SlotRun {
  int first = 0, count = 0;
};

/// FFTW plans for the DCT-II and DCT-III of each array shape, made once and shared. The FFTW
/// planner is not thread-safe, so plans are made and destroyed under the process's one planner
/// lock (engine/fftw_planner.hpp); executing a plan on other (equally aligned) arrays is
/// thread-safe (fftw_execute_r2r). One instance per method object; arrays passed to it must come
/// from `DctBuffer` (FFTW's alignment).
class DctPlanCache {
 public:
  explicit DctPlanCache(DctPlanning planning = {});
  ~DctPlanCache();
  DctPlanCache(const DctPlanCache&) = delete;
  DctPlanCache& operator=(const DctPlanCache&) = delete;

  /// Unnormalised in-place DCT-II (forward) or DCT-III (inverse) of a row-major array.
  /// inverse(forward(x)) = 8 n0 n1 n2 x (a factor 2 n_k per axis; [FJ05]).
  void forward(const Shape3& shape, double* data) const;
  void inverse(const Shape3& shape, double* data) const;
  /// The same along axes 0 and 1 only, for every index of axis 2:
  /// inverse_space(forward_space(x)) = 4 n0 n1 x.
  void forward_space(const Shape3& shape, double* data) const;
  void inverse_space(const Shape3& shape, double* data) const;
  /// The same for the indices of axis 2 in `runs` only; the others are left as they are.
  void forward_space(const Shape3& shape, double* data, std::span<const SlotRun> runs) const;
  void inverse_space(const Shape3& shape, double* data, std::span<const SlotRun> runs) const;
  /// The same in single precision (FFTW's fftwf plans; their wisdom in `wisdom_file`.single).
  void forward_space(const Shape3& shape, float* data, std::span<const SlotRun> runs) const;
  void inverse_space(const Shape3& shape, float* data, std::span<const SlotRun> runs) const;
  /// Orthonormal versions (scipy.fft.dctn / idctn with norm='ortho').
  void forward_ortho(const Shape3& shape, double* data) const;
  void inverse_ortho(const Shape3& shape, double* data) const;
  std::size_t plans() const;

 private:
  // halfcomplex: a real FFT (r2c forward, c2r inverse) of length shape[0] on a contiguous
  // buffer of shape[0] x batch values, the batch fastest (the DCT of an even length by [M80]).
  enum class Pass { whole, along_rows, along_columns, halfcomplex };
  // `batch`: the number of consecutive axis-2 indices a space pass transforms at once.
  const void* plan(const Shape3& shape, bool inverse, Pass pass, bool aligned, int batch = 0,
                   bool single = false) const;
  template <typename Real>
  void space_passes(const Shape3& shape, Real* data, bool inverse,
                    std::span<const SlotRun> runs) const;
  DctPlanning planning_;
  mutable bool wisdom_read_[2] = {false, false};  // double, single
  // (shape, inverse, pass, aligned, batch, single)
  mutable std::map<std::tuple<Shape3, bool, int, bool, int, bool>, void*> plans_;
};

/// An array with FFTW's alignment.
template <typename Real>
class BasicDctBuffer {
 public:
  BasicDctBuffer() = default;
  explicit BasicDctBuffer(std::size_t n) { resize(n); }
  ~BasicDctBuffer();
  BasicDctBuffer(BasicDctBuffer&& other) noexcept;
  BasicDctBuffer& operator=(BasicDctBuffer&& other) noexcept;
  BasicDctBuffer(const BasicDctBuffer&) = delete;
  BasicDctBuffer& operator=(const BasicDctBuffer&) = delete;
  void resize(std::size_t n);  // contents undefined after a growth
  Real* data() { return data_; }
  const Real* data() const { return data_; }
  std::size_t size() const { return size_; }
  Real& operator[](std::size_t i) { return data_[i]; }
  Real operator[](std::size_t i) const { return data_[i]; }
  std::span<Real> span() { return {data_, size_}; }

 private:
  Real* data_ = nullptr;
  std::size_t size_ = 0, capacity_ = 0;
};
using DctBuffer = BasicDctBuffer<double>;
extern template class BasicDctBuffer<double>;
extern template class BasicDctBuffer<float>;

struct PlsSettings {
  double s_space = 1.0;  // smoothing across axes 0 and 1
  double s_time = 1.0;   // smoothing along axis 2
  double tolerance = 1e-5;  // relative residual ||b - A z|| / ||b|| of the normal equations
  int max_iterations = 500;
  // filter_shifted only (the solve does not transform time): pad the time axis (axis 2) with
  // zero-weight cells to a length whose only prime factors are 2, 3 and 5, where FFTW is fastest. The padded problem has the same data and a free far end,
  // so its solution differs from the unpadded one only near the end of the series. Space is not
  // padded: blocks of one stack have different widths, and padding would give each its own
  // boundary condition at the raster's edge (results would depend on the block size).
  bool pad = false;
  // The solver's vectors and the preconditioner's stored factors in single precision (the
  // solution z, the dot products, the factorisation and the banded solves are computed in
  // double): half the memory traffic of an iteration's sweeps. The vectors carry about seven
  // digits; spacetime uses it for tolerances of 1e-5 and coarser.
  bool single_precision = false;
  // Correct the start by the same problem on grids of half, a quarter, ... the resolution in
  // space (nested iteration [B77], see the solve), each solved to tolerance x coarse_tightening.
  // A 512 x 512 x 46 stack filled in 4 blocks and in 1 then agrees within 0.001 at a tolerance
  // of 1e-4 (0.023 without), and its fill takes 18 s instead of 30 s at 1e-5 without.
  bool coarse_start = true;
  double coarse_tightening = 0.1;
};

struct PlsResult {
  int iterations = 0;
  double relative_residual = 0;
  bool converged = false;
};

/// One precision's vectors of a solve.
template <typename Real>
struct PlsBuffers {
  BasicDctBuffer<Real> residual, direction, direction_spectrum, product, weight;
  std::vector<Real> factor_d, factor_l1, factor_l2;  // the preconditioner's LDL^T factors
  void reserve(std::size_t n) {
    for (auto* b : {&residual, &direction, &direction_spectrum, &product})
      b->resize(std::max(n, b->size()));
    // A double solve reads the caller's weights; a single one a copy in its own precision.
    if constexpr (!std::is_same_v<Real, double>) weight.resize(std::max(n, weight.size()));
    for (auto* v : {&factor_d, &factor_l1, &factor_l2}) v->reserve(n);
  }
};

/// Scratch for one solve; reused across blocks by one thread.
struct PlsWorkspace {
  PlsBuffers<double> wide;
  PlsBuffers<float> narrow;
  /// Room for solves of up to n cells in the given precision: buffers only grow, so solves of
  /// several shapes can then share it without allocating again.
  void reserve(std::size_t n, bool single_precision = false) {
    if (single_precision) narrow.reserve(n);
    else wide.reserve(n);
  }
};

/// The penalty's eigenvalues p_j in the DCT domain, row-major like the data.
void penalty_eigenvalues(const Shape3& shape, double s_space, double s_time, std::span<double> out);

/// Solves (W + P) z = W y for z (size n0 n1 n2). `z` holds the start value on entry (zeros are
/// fine). Where w = 0, y is not read. At least one weight must be positive unless P is
/// positive definite, which it never is (constants are free), so an all-zero w gives z = start.
PlsResult solve_pls(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                    std::span<const double> w, const PlsSettings& settings, std::span<double> z,
                    PlsWorkspace& ws);

/// z = C^T (1 / (omega + p)) C x: the preconditioner, also a quick "support" smoother.
void apply_inverse_shifted(const DctPlanCache& plans, const Shape3& shape,
                           std::span<const double> eigen, double omega, std::span<double> x);

/// The same filter with the penalty of `settings` (padded as the solve would be), in place.
void filter_shifted(const DctPlanCache& plans, const Shape3& shape, const PlsSettings& settings,
                    double omega, std::span<double> x);

/// The smallest length >= n whose only prime factors are 2, 3 and 5.
int smooth_length(int n);

}  // namespace kalends::detail
