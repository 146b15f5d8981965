#include "fill/dct_pls.hpp"

#include <fftw3.h>

#include <algorithm>
#include <cmath>
#include <new>
#include <numbers>
#include <numeric>

namespace kalends::detail {

// ---------------------------------------------------------------------------------------------
// Buffers

DctBuffer::~DctBuffer() {
  if (data_) fftw_free(data_);
}

DctBuffer::DctBuffer(DctBuffer&& other) noexcept
    : data_(other.data_), size_(other.size_), capacity_(other.capacity_) {
  other.data_ = nullptr;
  other.size_ = other.capacity_ = 0;
}

DctBuffer& DctBuffer::operator=(DctBuffer&& other) noexcept {
  if (this != &other) {
    if (data_) fftw_free(data_);
    data_ = other.data_;
    size_ = other.size_;
    capacity_ = other.capacity_;
    other.data_ = nullptr;
    other.size_ = other.capacity_ = 0;
  }
  return *this;
}

void DctBuffer::resize(std::size_t n) {
  if (n > capacity_) {
    if (data_) fftw_free(data_);
    data_ = static_cast<double*>(fftw_malloc(std::max<std::size_t>(1, n) * sizeof(double)));
    if (!data_) throw std::bad_alloc();
    capacity_ = n;
  }
  size_ = n;
}

// ---------------------------------------------------------------------------------------------
// Plans

DctPlanCache::DctPlanCache() = default;

DctPlanCache::~DctPlanCache() {
  std::lock_guard lock(mutex_);
  for (auto& [key, plan] : plans_) fftw_destroy_plan(static_cast<fftw_plan>(plan));
}

std::size_t DctPlanCache::plans() const {
  std::lock_guard lock(mutex_);
  return plans_.size();
}

const void* DctPlanCache::plan(const Shape3& shape, bool inverse) const {
  std::lock_guard lock(mutex_);
  const auto key = std::make_pair(shape, inverse);
  auto it = plans_.find(key);
  if (it != plans_.end()) return it->second;
  // Axes of length 1 are left out: FFTW's r2r of length 1 is the identity times 2, which the
  // normalisation below would have to undo for nothing.
  int n[3], kinds_n = 0;
  fftw_r2r_kind kinds[3];
  for (int k = 0; k < 3; ++k)
    if (shape[k] > 1) {
      n[kinds_n] = shape[k];
      kinds[kinds_n] = inverse ? FFTW_REDFT01 : FFTW_REDFT10;
      ++kinds_n;
    }
  void* made = nullptr;
  if (kinds_n > 0) {
    // FFTW_ESTIMATE never touches the array, so a scratch buffer of the right alignment will do;
    // plans are later executed on other arrays of the same alignment (fftw_malloc).
    const std::size_t size = std::size_t(shape[0]) * shape[1] * shape[2];
    DctBuffer scratch(size);
    made = fftw_plan_r2r(kinds_n, n, scratch.data(), scratch.data(), kinds, FFTW_ESTIMATE);
    if (!made) throw std::runtime_error("FFTW could not plan a DCT");
  }
  plans_.emplace(key, made);
  return made;
}

void DctPlanCache::forward(const Shape3& shape, double* data) const {
  if (auto p = plan(shape, false)) fftw_execute_r2r(static_cast<fftw_plan>(const_cast<void*>(p)), data, data);
}

void DctPlanCache::inverse(const Shape3& shape, double* data) const {
  if (auto p = plan(shape, true)) fftw_execute_r2r(static_cast<fftw_plan>(const_cast<void*>(p)), data, data);
}

namespace {

// Orthonormal scaling of index j on an axis of length n: the DCT-II sum 2 sum x cos(...) times
// sqrt(1/(4n)) at j = 0 and sqrt(1/(2n)) elsewhere is scipy's norm='ortho' DCT-II.
double ortho_factor(int j, int n) { return j == 0 ? std::sqrt(1.0 / (4.0 * n)) : std::sqrt(1.0 / (2.0 * n)); }

void scale_axes(const Shape3& shape, double* data, bool inverse) {
  std::vector<double> f[3];
  for (int k = 0; k < 3; ++k) {
    f[k].resize(shape[k]);
    for (int j = 0; j < shape[k]; ++j) {
      if (shape[k] == 1) {
        f[k][j] = 1.0;
      } else if (!inverse) {
        f[k][j] = ortho_factor(j, shape[k]);
      } else {
        // REDFT01: x_i = Y_0 + 2 sum_{j>0} Y_j cos(...); scipy's ortho DCT-III:
        // x_i = Y_0 / sqrt(n) + sqrt(2/n) sum_{j>0} Y_j cos(...).
        f[k][j] = j == 0 ? 1.0 / std::sqrt(double(shape[k])) : 1.0 / std::sqrt(2.0 * shape[k]);
      }
    }
  }
  std::size_t i = 0;
  for (int a = 0; a < shape[0]; ++a)
    for (int b = 0; b < shape[1]; ++b) {
      const double fab = f[0][a] * f[1][b];
      for (int c = 0; c < shape[2]; ++c) data[i++] *= fab * f[2][c];
    }
}

}  // namespace

void DctPlanCache::forward_ortho(const Shape3& shape, double* data) const {
  forward(shape, data);
  scale_axes(shape, data, false);
}

void DctPlanCache::inverse_ortho(const Shape3& shape, double* data) const {
  scale_axes(shape, data, true);
  inverse(shape, data);
}

// ---------------------------------------------------------------------------------------------
// Penalised least squares

void penalty_eigenvalues(const Shape3& shape, double s_space, double s_time, std::span<double> out) {
  std::vector<double> lambda[3];
  for (int k = 0; k < 3; ++k) {
    lambda[k].resize(shape[k]);
    for (int j = 0; j < shape[k]; ++j)
      lambda[k][j] = -2.0 + 2.0 * std::cos(std::numbers::pi * j / shape[k]);
  }
  std::size_t i = 0;
  for (int a = 0; a < shape[0]; ++a)
    for (int b = 0; b < shape[1]; ++b) {
      const double space = lambda[0][a] + lambda[1][b];
      const double space_term = s_space * space * space;
      for (int c = 0; c < shape[2]; ++c)
        out[i++] = space_term + s_time * lambda[2][c] * lambda[2][c];
    }
}

namespace {

double unnormalised_scale(const Shape3& shape) {
  double scale = 1.0;
  for (int k = 0; k < 3; ++k)
    if (shape[k] > 1) scale *= 2.0 * shape[k];
  return scale;
}

// x <- C^T diag(f(p)) C x with the unnormalised transforms; `factor` already holds f(p) / scale.
template <typename F>
void apply_diagonal(const DctPlanCache& plans, const Shape3& shape, std::span<const double> eigen,
                    F&& f, double* x) {
  plans.forward(shape, x);
  const std::size_t n = eigen.size();
  for (std::size_t i = 0; i < n; ++i) x[i] *= f(eigen[i]);
  plans.inverse(shape, x);
}

double dot(const double* a, const double* b, std::size_t n) {
  double s = 0;
  for (std::size_t i = 0; i < n; ++i) s += a[i] * b[i];
  return s;
}

}  // namespace

void apply_inverse_shifted(const DctPlanCache& plans, const Shape3& shape,
                           std::span<const double> eigen, double omega, std::span<double> x) {
  const double scale = unnormalised_scale(shape);
  apply_diagonal(plans, shape, eigen, [&](double p) { return 1.0 / ((omega + p) * scale); },
                 x.data());
}

int smooth_length(int n) {
  for (int m = std::max(1, n);; ++m) {
    int r = m;
    for (int f : {2, 3, 5})
      while (r % f == 0) r /= f;
    if (r == 1) return m;
  }
}

namespace {

Shape3 padded_shape(const Shape3& shape) {
  return {shape[0], shape[1], smooth_length(shape[2])};
}

// Copies a row-major array of `from` into the leading corner of one of `to` (zeros elsewhere),
// or back.
void copy_into(const Shape3& from, const double* src, const Shape3& to, double* dst) {
  std::fill(dst, dst + std::size_t(to[0]) * to[1] * to[2], 0.0);
  for (int a = 0; a < from[0]; ++a)
    for (int b = 0; b < from[1]; ++b)
      std::copy_n(src + (std::size_t(a) * from[1] + b) * from[2], from[2],
                  dst + (std::size_t(a) * to[1] + b) * to[2]);
}
void copy_back(const Shape3& big, const double* src, const Shape3& small, double* dst) {
  for (int a = 0; a < small[0]; ++a)
    for (int b = 0; b < small[1]; ++b)
      std::copy_n(src + (std::size_t(a) * big[1] + b) * big[2], small[2],
                  dst + (std::size_t(a) * small[1] + b) * small[2]);
}

PlsResult solve_unpadded(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                         std::span<const double> w, const PlsSettings& settings,
                         std::span<double> z, PlsWorkspace& ws);

}  // namespace

void filter_shifted(const DctPlanCache& plans, const Shape3& shape, const PlsSettings& settings,
                    double omega, std::span<double> x) {
  const Shape3 big = settings.pad ? padded_shape(shape) : shape;
  const std::size_t n = std::size_t(big[0]) * big[1] * big[2];
  DctBuffer eigen(n), data(n);
  penalty_eigenvalues(big, settings.s_space, settings.s_time, eigen.span());
  copy_into(shape, x.data(), big, data.data());
  apply_inverse_shifted(plans, big, {eigen.data(), n}, omega, data.span());
  copy_back(big, data.data(), shape, x.data());
}

PlsResult solve_pls(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                    std::span<const double> w, const PlsSettings& settings, std::span<double> z,
                    PlsWorkspace& ws) {
  const Shape3 big = settings.pad ? padded_shape(shape) : shape;
  if (big == shape) return solve_unpadded(plans, shape, y, w, settings, z, ws);
  const std::size_t n = std::size_t(big[0]) * big[1] * big[2];
  std::vector<double> yb(n), wb(n), zb(n);
  copy_into(shape, y.data(), big, yb.data());
  copy_into(shape, w.data(), big, wb.data());
  copy_into(shape, z.data(), big, zb.data());
  const PlsResult result = solve_unpadded(plans, big, yb, wb, settings, zb, ws);
  copy_back(big, zb.data(), shape, z.data());
  return result;
}

namespace {

PlsResult solve_unpadded(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                         std::span<const double> w, const PlsSettings& settings,
                         std::span<double> z, PlsWorkspace& ws) {
  const std::size_t n = std::size_t(shape[0]) * shape[1] * shape[2];
  PlsResult result;
  if (ws.eigen_shape != shape || ws.eigen_s_space != settings.s_space ||
      ws.eigen_s_time != settings.s_time) {
    ws.eigen.resize(n);
    penalty_eigenvalues(shape, settings.s_space, settings.s_time, ws.eigen.span());
    ws.eigen_shape = shape;
    ws.eigen_s_space = settings.s_space;
    ws.eigen_s_time = settings.s_time;
  }
  const std::span<const double> eigen(ws.eigen.data(), n);
  ws.residual.resize(n);
  ws.direction.resize(n);
  ws.preconditioned.resize(n);
  ws.product.resize(n);
  double* r = ws.residual.data();
  double* d = ws.direction.data();
  double* q = ws.preconditioned.data();
  double* ad = ws.product.data();
  const double scale = unnormalised_scale(shape);
  double omega = 0;
  for (std::size_t i = 0; i < n; ++i) omega = std::max(omega, w[i]);
  if (omega <= 0) return result;  // nothing observed: z stays at its start value

  // A x = W x + P x.
  auto apply_system = [&](const double* x, double* out) {
    std::copy(x, x + n, out);
    apply_diagonal(plans, shape, eigen, [&](double p) { return p / scale; }, out);
    for (std::size_t i = 0; i < n; ++i) out[i] += w[i] * x[i];
  };
  // r = W y - A z.
  apply_system(z.data(), ad);
  double b_norm = 0;
  for (std::size_t i = 0; i < n; ++i) {
    const double b = w[i] > 0 ? w[i] * y[i] : 0.0;
    b_norm += b * b;
    r[i] = b - ad[i];
  }
  b_norm = std::sqrt(b_norm);
  if (b_norm == 0) b_norm = 1;
  std::copy(r, r + n, q);
  apply_inverse_shifted(plans, shape, eigen, omega, {q, n});
  std::copy(q, q + n, d);
  double rq = dot(r, q, n);
  for (int it = 0; it < settings.max_iterations; ++it) {
    result.relative_residual = std::sqrt(dot(r, r, n)) / b_norm;
    if (result.relative_residual <= settings.tolerance) {
      result.converged = true;
      break;
    }
    apply_system(d, ad);
    const double dad = dot(d, ad, n);
    if (!(dad > 0)) break;
    const double alpha = rq / dad;
    for (std::size_t i = 0; i < n; ++i) {
      z[i] += alpha * d[i];
      r[i] -= alpha * ad[i];
    }
    std::copy(r, r + n, q);
    apply_inverse_shifted(plans, shape, eigen, omega, {q, n});
    const double rq_next = dot(r, q, n);
    const double beta = rq_next / rq;
    rq = rq_next;
    for (std::size_t i = 0; i < n; ++i) d[i] = q[i] + beta * d[i];
    result.iterations = it + 1;
  }
  if (!result.converged) {
    result.relative_residual = std::sqrt(dot(r, r, n)) / b_norm;
    result.converged = result.relative_residual <= settings.tolerance;
  }
  return result;
}

}  // namespace

}  // namespace kalends::detail
