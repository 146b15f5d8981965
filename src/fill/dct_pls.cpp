#include "fill/dct_pls.hpp"
#include "engine/fftw_planner.hpp"

#include <fftw3.h>

#include <algorithm>
#include <array>
#include <cmath>
#include <cstdlib>
#include <filesystem>
#include <new>
#include <numbers>
#include <numeric>

#include "engine/parallel.hpp"
#include "io/text_file.hpp"

namespace kalends::detail {

// ---------------------------------------------------------------------------------------------
// Buffers

template <typename Real>
BasicDctBuffer<Real>::~BasicDctBuffer() {
  if (data_) fftw_free(data_);
}

template <typename Real>
BasicDctBuffer<Real>::BasicDctBuffer(BasicDctBuffer&& other) noexcept
    : data_(other.data_), size_(other.size_), capacity_(other.capacity_) {
  other.data_ = nullptr;
  other.size_ = other.capacity_ = 0;
}

template <typename Real>
BasicDctBuffer<Real>& BasicDctBuffer<Real>::operator=(BasicDctBuffer&& other) noexcept {
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

template <typename Real>
void BasicDctBuffer<Real>::resize(std::size_t n) {
  if (n > capacity_) {
    if (data_) fftw_free(data_);
    data_ = static_cast<Real*>(fftw_malloc(std::max<std::size_t>(1, n) * sizeof(Real)));
    if (!data_) throw std::bad_alloc();
    capacity_ = n;
  }
  size_ = n;
}

template class BasicDctBuffer<double>;
template class BasicDctBuffer<float>;

// ---------------------------------------------------------------------------------------------
// Plans

namespace {

// Adds FFTW's accumulated wisdom (of one precision) to the cache file; a cache that cannot be
// written is skipped.
void save_wisdom(const std::string& file, bool single) {
  char* text = single ? fftwf_export_wisdom_to_string() : fftw_export_wisdom_to_string();
  if (!text) return;
  const std::string wisdom(text);
  fftw_free(text);
  std::error_code ec;
  std::filesystem::create_directories(std::filesystem::path(file).parent_path(), ec);
  try {
    write_text_atomically(file, wisdom);
  } catch (const std::exception&) {
  }
}

}  // namespace

std::string default_wisdom_file() {
  auto set = [](const char* name) -> std::string {
    const char* v = std::getenv(name);
    return v && *v ? v : "";
  };
  std::string folder = set("KALENDS_CACHE_DIR");
  // The XDG Base Directory specification: a relative path in XDG_CACHE_HOME is invalid and
  // ignored (it had put the cache under whatever folder a cron job started in).
  if (folder.empty() && set("XDG_CACHE_HOME").starts_with('/')) folder = set("XDG_CACHE_HOME") + "/kalends";
  if (folder.empty() && !set("HOME").empty()) folder = set("HOME") + "/.cache/kalends";
  return folder.empty() ? "" : folder + "/fftw-wisdom";
}

DctPlanCache::DctPlanCache(DctPlanning planning) : planning_(std::move(planning)) {}

DctPlanCache::~DctPlanCache() {
  std::lock_guard lock(fftw_planner_mutex());
  for (auto& [key, plan] : plans_) {
    if (!plan) continue;
    if (std::get<5>(key)) fftwf_destroy_plan(static_cast<fftwf_plan>(plan));
    else fftw_destroy_plan(static_cast<fftw_plan>(plan));
  }
}

std::size_t DctPlanCache::plans() const {
  std::lock_guard lock(fftw_planner_mutex());
  return plans_.size();
}

const void* DctPlanCache::plan(const Shape3& shape, bool inverse, Pass pass, bool aligned,
                               int batch_slots, bool single) const {
  if (pass == Pass::whole || batch_slots <= 0) batch_slots = shape[2];
  std::lock_guard lock(fftw_planner_mutex());
  const auto key = std::make_tuple(shape, inverse, int(pass), aligned, batch_slots, single);
  auto it = plans_.find(key);
  if (it != plans_.end()) return it->second;
  // Axes of length 1 are left out: FFTW's r2r of length 1 is the identity times 2, which the
  // normalisation below would have to undo for nothing.
  int n[3], kinds_n = 0, batch = 1, stride = 1;
  fftw_r2r_kind kinds[3];
  const fftw_r2r_kind kind = inverse ? FFTW_REDFT01 : FFTW_REDFT10;
  if (pass == Pass::whole) {
    for (int k = 0; k < 3; ++k)
      if (shape[k] > 1) {
        n[kinds_n] = shape[k];
        kinds[kinds_n++] = kind;
      }
  } else if (pass == Pass::halfcomplex) {
    n[kinds_n++] = shape[0];
    batch = batch_slots;
    stride = batch_slots;
  } else {
    // One row (axis 1) or one column (axis 0) of the space axes, for every slot at once: the
    // slots are the fastest axis, so the batch is the slot run, at distance 1.
    const int axis = pass == Pass::along_rows ? 1 : 0;
    if (shape[axis] > 1) {
      n[kinds_n] = shape[axis];
      kinds[kinds_n++] = kind;
    }
    batch = batch_slots;
    stride = pass == Pass::along_rows ? shape[2] : shape[1] * shape[2];
  }
  void* made = nullptr;
  if (kinds_n > 0) {
    // Planning overwrites the array (FFTW_MEASURE) or never touches it (FFTW_ESTIMATE), so a
    // scratch buffer of the right alignment will do; plans are later executed on other arrays
    // of the same alignment (fftw_malloc), or were made FFTW_UNALIGNED.
    const bool halfcomplex = pass == Pass::halfcomplex;
    const std::size_t size =
        halfcomplex ? std::size_t(n[0]) * batch : std::size_t(shape[0]) * shape[1] * shape[2];
    const std::size_t spectrum_size = halfcomplex ? 2 * (std::size_t(n[0]) / 2 + 1) * batch : 0;
    const unsigned alignment = aligned ? 0u : unsigned(FFTW_UNALIGNED);
    // fftw_r2r_kind and fftwf_r2r_kind are the same enumeration.
    BasicDctBuffer<double> scratch(single ? 0 : size), spectrum(single ? 0 : spectrum_size);
    BasicDctBuffer<float> scratch_single(single ? size : 0), spectrum_single(single ? spectrum_size : 0);
    auto plan_r2r = [&](unsigned flags) -> void* {
      if (halfcomplex && single) {
        auto* c = reinterpret_cast<fftwf_complex*>(spectrum_single.data());
        return inverse ? fftwf_plan_many_dft_c2r(1, n, batch, c, nullptr, stride, 1,
                                                 scratch_single.data(), nullptr, stride, 1, flags)
                       : fftwf_plan_many_dft_r2c(1, n, batch, scratch_single.data(), nullptr,
                                                 stride, 1, c, nullptr, stride, 1, flags);
      }
      if (halfcomplex) {
        auto* c = reinterpret_cast<fftw_complex*>(spectrum.data());
        return inverse ? fftw_plan_many_dft_c2r(1, n, batch, c, nullptr, stride, 1, scratch.data(),
                                                nullptr, stride, 1, flags)
                       : fftw_plan_many_dft_r2c(1, n, batch, scratch.data(), nullptr, stride, 1,
                                                c, nullptr, stride, 1, flags);
      }
      if (single)
        return fftwf_plan_many_r2r(kinds_n, n, batch, scratch_single.data(), nullptr, stride, 1,
                                   scratch_single.data(), nullptr, stride, 1, kinds,
                                   flags | alignment);
      return fftw_plan_many_r2r(kinds_n, n, batch, scratch.data(), nullptr, stride, 1,
                                scratch.data(), nullptr, stride, 1, kinds, flags | alignment);
    };
    if (planning_.measure) {
      const bool keep = !planning_.wisdom_file.empty();
      const std::string file = planning_.wisdom_file + (single ? ".single" : "");
      if (keep && !wisdom_read_[single]) {
        // A missing or unreadable file is an empty cache, not an error; only a plain file is
        // read (a FIFO of that name had made the fill wait for ever).
        std::error_code ec;
        if (std::filesystem::is_regular_file(file, ec)) {
          if (single) fftwf_import_wisdom_from_filename(file.c_str());
          else fftw_import_wisdom_from_filename(file.c_str());
        }
        wisdom_read_[single] = true;
      }
      made = plan_r2r(FFTW_MEASURE | FFTW_WISDOM_ONLY);
      if (!made) {
        made = plan_r2r(FFTW_MEASURE);
        if (made && keep) save_wisdom(file, single);
      }
    } else {
      made = plan_r2r(FFTW_ESTIMATE);
    }
    if (!made) throw std::runtime_error("FFTW could not plan a DCT");
  }
  plans_.emplace(key, made);
  return made;
}

void DctPlanCache::forward(const Shape3& shape, double* data) const {
  if (auto p = plan(shape, false, Pass::whole, true))
    fftw_execute_r2r(static_cast<fftw_plan>(const_cast<void*>(p)), data, data);
}

void DctPlanCache::inverse(const Shape3& shape, double* data) const {
  if (auto p = plan(shape, true, Pass::whole, true))
    fftw_execute_r2r(static_cast<fftw_plan>(const_cast<void*>(p)), data, data);
}

namespace {

// The DCT-II (forward) or DCT-III (inverse, FFTW's REDFT10 and REDFT01, unnormalised) along one
// axis of even length N for a run of `batch` consecutive slots, by a real FFT [M80]: element n of
// slot j at at[n * along + j]. `line` (N x batch) and `spectrum` ((N/2 + 1) x batch complex)
// are scratch; `cosine`, `sine`: cos and sin of pi k / 2N, k = 0..N/2.
//   forward: v = the reordered sequence, V = FFT(v) (r2c), and for k = 0..N/2, V(k) = a + ib,
//            X(k) = 2 (c a + s b), X(N-k) = 2 (s a - c b);
//   inverse: V(k) = (X(k) - i X(N-k)) (c + i s), X(N) = 0, v = inverse FFT (c2r), and back to
//            the original order.
// Each is a copy, the FFT and a pass of multiplications over contiguous slots, which vectorise;
// FFTW's r2r plans for these layouts took 1.6 (rows) and 2 (columns) times as long (256 x 256 x
// 46, single precision, measured with a small C program against FFTW 3.3.10).
template <typename Real>
void dct_by_real_fft(Real* at, int length, std::size_t along, int batch, bool inverse,
                     const void* plan, Real* line, Real* spectrum, const Real* cosine,
                     const Real* sine) {
  const std::size_t width = std::size_t(batch);
  const int half = length / 2;
  auto execute = [&] {
    if constexpr (std::is_same_v<Real, float>) {
      auto* c = reinterpret_cast<fftwf_complex*>(spectrum);
      auto* p = static_cast<fftwf_plan>(const_cast<void*>(plan));
      if (inverse) fftwf_execute_dft_c2r(p, c, line);
      else fftwf_execute_dft_r2c(p, line, c);
    } else {
      auto* c = reinterpret_cast<fftw_complex*>(spectrum);
      auto* p = static_cast<fftw_plan>(const_cast<void*>(plan));
      if (inverse) fftw_execute_dft_c2r(p, c, line);
      else fftw_execute_dft_r2c(p, line, c);
    }
  };
  if (!inverse) {
    for (int n = 0; n < half; ++n) {
      std::copy_n(at + std::size_t(2 * n) * along, width, line + std::size_t(n) * width);
      std::copy_n(at + std::size_t(2 * n + 1) * along, width, line + std::size_t(length - 1 - n) * width);
    }
    execute();
    for (int k = 0; k <= half; ++k) {
      const Real c = cosine[k], s = sine[k];
      const Real* v = spectrum + 2 * std::size_t(k) * width;
      Real* low = at + std::size_t(k) * along;
      for (std::size_t j = 0; j < width; ++j) low[j] = 2 * (c * v[2 * j] + s * v[2 * j + 1]);
      if (k == 0 || k == half) continue;
      Real* high = at + std::size_t(length - k) * along;
      for (std::size_t j = 0; j < width; ++j) high[j] = 2 * (s * v[2 * j] - c * v[2 * j + 1]);
    }
  } else {
    for (int k = 0; k <= half; ++k) {
      const Real c = cosine[k], s = sine[k];
      Real* v = spectrum + 2 * std::size_t(k) * width;
      const Real* low = at + std::size_t(k) * along;
      const Real* high = at + std::size_t(length - k) * along;
      for (std::size_t j = 0; j < width; ++j) {
        const Real re = low[j], im = k == 0 ? Real(0) : -high[j];
        v[2 * j] = re * c - im * s;
        v[2 * j + 1] = re * s + im * c;
      }
    }
    execute();
    for (int n = 0; n < half; ++n) {
      std::copy_n(line + std::size_t(n) * width, width, at + std::size_t(2 * n) * along);
      std::copy_n(line + std::size_t(length - 1 - n) * width, width, at + std::size_t(2 * n + 1) * along);
    }
  }
}

}  // namespace

// The space transform as two passes of one-dimensional transforms, rows then columns, each
// spread over the threads. Every row (column) uses the same plan whatever the number of
// threads, so the result does not depend on it. With `runs`, only those slots are transformed:
// one plan per run length, executed at the run's offset in each row (column). An even length
// goes through a real FFT ([M80], dct_by_real_fft above); an odd one through FFTW's r2r plans,
// as fast as FFTW's own two-dimensional plan on 256 x 256 x 48 (23.0 against 24.2 ms, FFTW
// 3.3.10, measured once).
template <typename Real>
void DctPlanCache::space_passes(const Shape3& shape, Real* data, bool inverse,
                                std::span<const SlotRun> runs) const {
  constexpr bool single = std::is_same_v<Real, float>;
  const std::size_t row = std::size_t(shape[1]) * shape[2];
  std::vector<void*> run_plans(runs.size());
  std::size_t slots = 0;
  int widest = 0;
  for (const SlotRun& run : runs) {
    slots += std::size_t(run.count);
    widest = std::max(widest, run.count);
  }
  if (slots == 0) return;
  for (Pass pass : {Pass::along_rows, Pass::along_columns}) {
    const bool rows = pass == Pass::along_rows;
    const std::size_t count = rows ? std::size_t(shape[0]) : std::size_t(shape[1]);
    const std::size_t step = rows ? row : std::size_t(shape[2]);
    const int length = rows ? shape[1] : shape[0];
    const std::size_t along = rows ? std::size_t(shape[2]) : row;
    if (length < 2) continue;  // the DCT of length 1 is the identity (up to FFTW's factor 2)
    const std::size_t values_per_item = std::size_t(length) * slots;
    const std::size_t grain = std::max<std::size_t>(1, (std::size_t(1) << 15) / values_per_item);
    if (length % 2 == 0) {
      for (std::size_t j = 0; j < runs.size(); ++j)
        run_plans[j] = const_cast<void*>(
            plan({length, 0, 0}, inverse, Pass::halfcomplex, true, runs[j].count, single));
      const int half = length / 2;
      std::vector<Real> cosine(half + 1), sine(half + 1);
      for (int k = 0; k <= half; ++k) {
        const double angle = std::numbers::pi * k / (2.0 * length);
        cosine[k] = Real(std::cos(angle));
        sine[k] = Real(std::sin(angle));
      }
      parallel_ranges(count, grain, [&](std::size_t a, std::size_t b) {
        BasicDctBuffer<Real> line(std::size_t(length) * widest),
            spectrum(2 * (std::size_t(half) + 1) * widest);
        for (std::size_t k = a; k < b; ++k)
          for (std::size_t j = 0; j < runs.size(); ++j)
            dct_by_real_fft(data + k * step + runs[j].first, length, along, runs[j].count,
                            inverse, run_plans[j], line.data(), spectrum.data(), cosine.data(),
                            sine.data());
      });
      continue;
    }
    for (std::size_t j = 0; j < runs.size(); ++j) {
      // A plan made on an aligned array must run on one of the same alignment [FFTW 3.3
      // manual, "New-array Execute Functions"]; offsets of an odd length need the unaligned
      // plan.
      bool all_aligned = true;
      for (std::size_t k = 0; k < count && all_aligned; ++k) {
        Real* at = data + k * step + runs[j].first;
        if constexpr (single) all_aligned = fftwf_alignment_of(at) == 0;
        else all_aligned = fftw_alignment_of(at) == 0;
      }
      run_plans[j] = const_cast<void*>(plan(shape, inverse, pass, all_aligned, runs[j].count, single));
    }
    parallel_ranges(count, grain, [&](std::size_t a, std::size_t b) {
      for (std::size_t k = a; k < b; ++k)
        for (std::size_t j = 0; j < runs.size(); ++j) {
          Real* at = data + k * step + runs[j].first;
          if (!run_plans[j]) continue;
          if constexpr (single)
            fftwf_execute_r2r(static_cast<fftwf_plan>(run_plans[j]), at, at);
          else
            fftw_execute_r2r(static_cast<fftw_plan>(run_plans[j]), at, at);
        }
    });
  }
}

void DctPlanCache::forward_space(const Shape3& shape, double* data) const {
  const SlotRun all{0, shape[2]};
  space_passes(shape, data, false, {&all, 1});
}

void DctPlanCache::inverse_space(const Shape3& shape, double* data) const {
  const SlotRun all{0, shape[2]};
  space_passes(shape, data, true, {&all, 1});
}

void DctPlanCache::forward_space(const Shape3& shape, double* data,
                                 std::span<const SlotRun> runs) const {
  space_passes(shape, data, false, runs);
}

void DctPlanCache::inverse_space(const Shape3& shape, double* data,
                                 std::span<const SlotRun> runs) const {
  space_passes(shape, data, true, runs);
}

void DctPlanCache::forward_space(const Shape3& shape, float* data,
                                 std::span<const SlotRun> runs) const {
  space_passes(shape, data, false, runs);
}

void DctPlanCache::inverse_space(const Shape3& shape, float* data,
                                 std::span<const SlotRun> runs) const {
  space_passes(shape, data, true, runs);
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

// Elements per piece of the solver's parallel loops and sums (a few hundred KiB of doubles).
constexpr std::size_t vector_chunk = std::size_t(1) << 14;

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

// ---------------------------------------------------------------------------------------------
// The solve in the space-DCT, time domain
//
// With C_s the DCT-II over axes 0 and 1 (for every slot), the penalty becomes, for each spatial
// frequency (a, b) with sigma = lambda_0(a) + lambda_1(b), the pentadiagonal matrix
//   P_ab = s_space sigma^2 I + s_time L_2^2
// acting along time. The preconditioner replaces W by its mean over the pixels of each slot,
// wbar(t), which is exact for the spatial mean and keeps whole dates without data (winters,
// cloudy dates) in the preconditioner:
//   M = C_s^T blockdiag(diag(wbar) + P_ab)^-1 C_s,
// one pentadiagonal LDL^T solve per spatial frequency. Whole-date gaps are what made the
// (omega I + P)^-1 preconditioner of [G10] slow; this one leaves mostly the spatial gaps.
namespace {

// The solve with its vectors and the preconditioner's stored factors in precision Real
// (PlsSettings::single_precision). Whatever Real, the factorisation, the banded solves, the dot
// products and z are computed in double. `rhs`, when given, replaces W y (y is then not read).
template <typename Real>
PlsResult solve_pls_in(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                       std::span<const double> w, const PlsSettings& settings, std::span<double> z,
                       PlsBuffers<Real>& ws, const double* rhs = nullptr) {
  const int n0 = shape[0], n1 = shape[1], nt = shape[2];
  const std::size_t frequencies = std::size_t(n0) * n1;
  const std::size_t n = frequencies * nt;
  PlsResult result;
  double omega = 0;
  for (std::size_t i = 0; i < n; ++i) omega = std::max(omega, w[i]);
  if (omega <= 0) return result;  // nothing observed: z stays at its start value

  // s_space sigma^2 per spatial frequency (the penalty's eigenvalues of a one-slot array); the
  // bands of s_time L^2 (L: Neumann second difference along time, diagonal -1, -2, ..., -2, -1
  // and off-diagonals 1).
  std::vector<double> space_term(frequencies);
  penalty_eigenvalues({n0, n1, 1}, settings.s_space, 0.0, space_term);
  std::vector<double> band0(nt, 0.0), band1(nt, 0.0), band2(nt, 0.0);  // (t,t), (t+1,t), (t+2,t)
  if (nt > 1) {
    std::vector<double> diag(nt, -2.0);
    diag[0] = diag[nt - 1] = -1.0;
    // (L^2)(i,j) = sum_k L(i,k) L(k,j), L tridiagonal with unit off-diagonals.
    for (int t = 0; t < nt; ++t) {
      band0[t] = diag[t] * diag[t] + (t > 0 ? 1.0 : 0.0) + (t + 1 < nt ? 1.0 : 0.0);
      if (t + 1 < nt) band1[t] = diag[t] + diag[t + 1];
      if (t + 2 < nt) band2[t] = 1.0;
    }
    for (int t = 0; t < nt; ++t) {
      band0[t] *= settings.s_time;
      band1[t] *= settings.s_time;
      band2[t] *= settings.s_time;
    }
  }
  std::vector<double> mean_weight(nt, 0.0);
  for (std::size_t f = 0; f < frequencies; ++f)
    for (int t = 0; t < nt; ++t) mean_weight[t] += w[f * nt + t];
  for (int t = 0; t < nt; ++t) mean_weight[t] /= double(frequencies);

  // Slots with no weight anywhere (winters of a summer-only stack, wholly cloudy dates): W is 0
  // there, so the solve never needs their values in space. Their parts of the vectors below stay
  // in the orthonormal space-DCT domain from start to end (the dot products are the same in
  // both domains), and only the slots with data are transformed.
  std::vector<SlotRun> data_runs, empty_runs;
  std::vector<int> empty_slots;
  for (int t = 0; t < nt; ++t) {
    const bool has_data = mean_weight[t] > 0;
    auto& runs = has_data ? data_runs : empty_runs;
    if (t > 0 && has_data == (mean_weight[t - 1] > 0)) ++runs.back().count;
    else runs.push_back({t, 1});
    if (!has_data) empty_slots.push_back(t);
  }
  // A floor keeps every factor positive definite where sigma = 0 and wbar is zero.
  const double floor = 1e-9 * omega;

  // The LDL^T factors of diag(wbar) + P_ab for every frequency, made once per solve, in double
  // (only the last two rows are needed) and kept in Real. The solves run `lanes` frequencies in
  // lockstep (see precondition below), so the factors are stored for that: group g = f / lanes,
  // time t, lane f % lanes at ((g nt + t) lanes + f % lanes); the last group's unused lanes hold 0.
  constexpr int lanes = 4;
  const std::size_t groups = (frequencies + lanes - 1) / lanes;
  const std::size_t factor_size = groups * std::size_t(nt) * lanes;
  ws.factor_d.assign(factor_size, Real(0));
  ws.factor_l1.assign(factor_size, Real(0));
  ws.factor_l2.assign(factor_size, Real(0));
  // Pieces of whole groups, so that each piece's solves run in full groups.
  const std::size_t frequency_grain =
      std::max<std::size_t>(1, vector_chunk / std::size_t(nt) / lanes) * lanes;
  auto each_frequency = [&](auto&& body) { parallel_each(frequencies, frequency_grain, body); };
  auto factor_at = [&](std::size_t f, int t) {
    return ((f / lanes) * std::size_t(nt) + std::size_t(t)) * lanes + f % lanes;
  };
  each_frequency([&](std::size_t f) {
    const double extra = space_term[f];
    double d1 = 0, d2 = 0, l1_2 = 0;  // d[t-1], d[t-2], l1[t-2]
    for (int t = 0; t < nt; ++t) {
      // Row t: A(t,t) = band0 + wbar + extra, A(t,t-1) = band1[t-1], A(t,t-2) = band2[t-2].
      double dt = band0[t] + mean_weight[t] + extra + floor;
      double l2_2 = 0, l1_1 = 0;
      if (t >= 2) {
        l2_2 = band2[t - 2] / d2;
        dt -= l2_2 * l2_2 * d2;
        ws.factor_l2[factor_at(f, t - 2)] = Real(l2_2);
      }
      if (t >= 1) {
        double s1 = band1[t - 1];
        if (t >= 2) s1 -= l2_2 * l1_2 * d2;
        l1_1 = s1 / d1;
        dt -= l1_1 * l1_1 * d1;
        ws.factor_l1[factor_at(f, t - 1)] = Real(l1_1);
      }
      ws.factor_d[factor_at(f, t)] = Real(1.0 / dt);  // 1 / D
      d2 = d1;
      d1 = dt;
      l1_2 = l1_1;
    }
  });
  // x <- (LDL^T)^-1 x for the `lanes` frequencies of group g, in double; x is nt x lanes, the
  // frequency fastest. Each solve is a chain of dependent operations along time; a group in
  // lockstep keeps the processor busy and vectorises (the preconditioner took 10 % of a bench
  // fill one frequency at a time). Each frequency's operations are the same as alone.
  auto solve_group = [&](std::size_t g, double* x) {
    const std::size_t base = g * std::size_t(nt) * lanes;
    const Real* inverse_d = ws.factor_d.data() + base;
    const Real* l1 = ws.factor_l1.data() + base;
    const Real* l2 = ws.factor_l2.data() + base;
    auto at = [&](int t, int k) { return std::size_t(t) * lanes + k; };
    if (nt > 1)
      for (int k = 0; k < lanes; ++k) x[at(1, k)] -= double(l1[at(0, k)]) * x[at(0, k)];
    for (int t = 2; t < nt; ++t)
      for (int k = 0; k < lanes; ++k)
        x[at(t, k)] -= double(l1[at(t - 1, k)]) * x[at(t - 1, k)] + double(l2[at(t - 2, k)]) * x[at(t - 2, k)];
    for (int t = 0; t < nt; ++t)
      for (int k = 0; k < lanes; ++k) x[at(t, k)] *= double(inverse_d[at(t, k)]);
    if (nt > 1)
      for (int k = 0; k < lanes; ++k) x[at(nt - 2, k)] -= double(l1[at(nt - 2, k)]) * x[at(nt - 1, k)];
    for (int t = nt - 3; t >= 0; --t)
      for (int k = 0; k < lanes; ++k)
        x[at(t, k)] -= double(l1[at(t, k)]) * x[at(t + 1, k)] + double(l2[at(t, k)]) * x[at(t + 2, k)];
  };
  // Orthonormal spectra: x_hat = R C_s x, C_s FFTW's unnormalised two-dimensional transform
  // and R the orthonormal factors of each spatial frequency (scale_axes above, per axis); back,
  // x = C_s^T R^-1 x_hat / scale, FFTW's inverse undoing C_s up to `scale`.
  double scale = 1.0;
  for (int k = 0; k < 2; ++k)
    if (shape[k] > 1) scale *= 2.0 * shape[k];
  std::vector<double> root_factor(frequencies), back_factor(frequencies);
  for (int a = 0; a < n0; ++a)
    for (int b = 0; b < n1; ++b) {
      const std::size_t f = std::size_t(a) * n1 + b;
      root_factor[f] = (n0 > 1 ? ortho_factor(a, n0) : 1.0) * (n1 > 1 ? ortho_factor(b, n1) : 1.0);
      back_factor[f] = 1.0 / (root_factor[f] * scale);
    }
  std::vector<std::uint8_t> slot_has_data(nt);
  for (int t = 0; t < nt; ++t) slot_has_data[t] = mean_weight[t] > 0;
  // FFTW's spectrum of one frequency's slots with data to the orthonormal one. Only those slots
  // are transformed; the empty ones hold orthonormal spectra throughout.
  auto to_orthonormal = [&](std::size_t f, Real* row) {
    for (const SlotRun& run : data_runs)
      for (int t = run.first; t < run.first + run.count; ++t) row[t] *= root_factor[f];
  };
  // out += P_ab x_hat for frequency f (orthonormal spectra: P is s_space sigma^2 + s_time L^2).
  auto add_penalty = [&](std::size_t f, const Real* x, Real* out) {
    const double extra = space_term[f];
    auto edge = [&](int t) {
      double v = (band0[t] + extra) * x[t];
      if (t >= 1) v += band1[t - 1] * x[t - 1];
      if (t + 1 < nt) v += band1[t] * x[t + 1];
      if (t >= 2) v += band2[t - 2] * x[t - 2];
      if (t + 2 < nt) v += band2[t] * x[t + 2];
      out[t] += v;
    };
    const int inner_end = std::max(2, nt - 2);
    for (int t = 0; t < std::min(2, nt); ++t) edge(t);
    for (int t = 2; t < inner_end; ++t)  // no ends to test for
      out[t] += (band0[t] + extra) * x[t] + band1[t - 1] * x[t - 1] + band1[t] * x[t + 1] +
                band2[t - 2] * x[t - 2] + band2[t] * x[t + 2];
    for (int t = inner_end; t < nt; ++t) edge(t);
  };

  ws.residual.resize(n);
  ws.direction.resize(n);
  ws.direction_spectrum.resize(n);
  ws.product.resize(n);
  Real* r_hat = ws.residual.data();            // the residual's spectrum
  Real* d = ws.direction.data();               // the direction, on the slots with data
  Real* d_hat = ws.direction_spectrum.data();  // its spectrum
  // (W + P) d as a spectrum; once the residual is updated from it, M r (as a spectrum) in its
  // place, so that a frequency's rows are read and written in one pass.
  Real* ad_hat = ws.product.data();
  Real* q_hat = ad_hat;
  auto in_chunks = [&](auto&& body) { parallel_ranges(n, vector_chunk, body); };
  // The weights read in each iteration, in Real.
  const Real* weight = nullptr;
  if constexpr (std::is_same_v<Real, double>) {
    weight = w.data();
  } else {
    ws.weight.resize(n);
    in_chunks([&](std::size_t a, std::size_t e) {
      for (std::size_t i = a; i < e; ++i) ws.weight[i] = Real(w[i]);
    });
    weight = ws.weight.data();
  }

  // r = W y - (W + P) z, as a spectrum. The empty slots of z become spectra here.
  in_chunks([&](std::size_t a, std::size_t e) {
    for (std::size_t i = a; i < e; ++i) ad_hat[i] = Real(z[i]);
  });
  const SlotRun all_slots{0, nt};
  plans.forward_space(shape, ad_hat, {&all_slots, 1});
  each_frequency([&](std::size_t f) {
    Real* z_hat = ad_hat + f * nt;
    for (int t = 0; t < nt; ++t) z_hat[t] *= root_factor[f];
    for (int t : empty_slots) z[f * nt + t] = z_hat[t];
  });
  double b_norm = std::sqrt(deterministic_sum(n, vector_chunk, [&](std::size_t a, std::size_t e) {
    double sum = 0;
    for (std::size_t i = a; i < e; ++i) {
      const double b = rhs ? rhs[i] : w[i] > 0 ? w[i] * y[i] : 0.0;
      sum += b * b;
      r_hat[i] = Real(w[i] > 0 ? b - w[i] * z[i] : b);
    }
    return sum;
  }));
  if (b_norm == 0) b_norm = 1;
  // A right-hand side of the caller's (a coarse grid's residual) may have values on every slot.
  plans.forward_space(shape, r_hat, rhs ? std::span<const SlotRun>(&all_slots, 1)
                                        : std::span<const SlotRun>(data_runs));
  parallel_ranges(frequencies, frequency_grain, [&](std::size_t a, std::size_t e) {
    std::vector<Real> penalty(nt);
    for (std::size_t f = a; f < e; ++f) {
      Real* row = r_hat + f * nt;
      if (rhs)
        for (int t = 0; t < nt; ++t) row[t] *= root_factor[f];
      else
        to_orthonormal(f, row);
      std::fill(penalty.begin(), penalty.end(), Real(0));
      add_penalty(f, ad_hat + f * nt, penalty.data());
      for (int t = 0; t < nt; ++t) row[t] -= penalty[t];
    }
  });
  // Sums over the frequencies in pieces fixed by the grain alone: the same whatever the threads.
  auto over_frequencies = [&](auto&& body) {
    return deterministic_sum_of(frequencies, frequency_grain, body);
  };
  // ad_hat <- (W + P) x as an orthonormal spectrum, from x on the slots with data in space (in
  // d) and its spectrum on every slot (in d_hat): W x needs a transform, P x none. One pass per
  // frequency finishes its row, then `row_done(f)` (its term is summed in order and returned).
  auto apply_operator = [&](auto&& row_done) {
    in_chunks([&](std::size_t a, std::size_t e) {
      for (std::size_t i = a; i < e; ++i) ad_hat[i] = weight[i] * d[i];  // 0 on the empty slots
    });
    plans.forward_space(shape, ad_hat, data_runs);
    return over_frequencies([&](std::size_t f) {
      Real* row = ad_hat + f * nt;
      to_orthonormal(f, row);
      add_penalty(f, d_hat + f * nt, row);
      return row_done(f);
    });
  };
  // The start, corrected on a coarser grid [B77; BHM00, ch. 3]: the residual equation
  // (W + P) e = r restricted to a grid of half the resolution in space (2 x 2 means), with the
  // weights' means, s_space / 16 (the second differences of a grid twice as coarse are 4 times
  // larger) and s_time as it is, solved by this same solve (itself corrected on a coarser grid,
  // down to 16 px), then interpolated bilinearly and added. The smooth parts of the solution,
  // the values deep inside long gaps of many pixels, are the ones this preconditioner resolves
  // slowly; solved tightly on the coarse grids, where they cost a quarter or less per iteration,
  // the fine iterations are left with the detail.
  if (settings.coarse_start && n0 >= 32 && n1 >= 32) {
    // r in space, on every slot (in d, free until the first direction).
    parallel_ranges(frequencies, frequency_grain, [&](std::size_t a, std::size_t e) {
      for (std::size_t f = a; f < e; ++f)
        for (int t = 0; t < nt; ++t) d[f * nt + t] = Real(r_hat[f * nt + t] * back_factor[f]);
    });
    plans.inverse_space(shape, d, {&all_slots, 1});
    const int m0 = (n0 + 1) / 2, m1 = (n1 + 1) / 2;
    const std::size_t coarse_cells = std::size_t(m0) * m1 * nt;
    std::vector<double> coarse_r(coarse_cells, 0.0), coarse_w(coarse_cells, 0.0), coarse_e(coarse_cells, 0.0);
    parallel_ranges(std::size_t(m0), 1, [&](std::size_t a, std::size_t e) {
      for (int i = int(a); i < int(e); ++i)
        for (int j = 0; j < m1; ++j) {
          double* r_sum = &coarse_r[(std::size_t(i) * m1 + j) * nt];
          double* w_sum = &coarse_w[(std::size_t(i) * m1 + j) * nt];
          int count = 0;
          for (int fi = 2 * i; fi < std::min(n0, 2 * i + 2); ++fi)
            for (int fj = 2 * j; fj < std::min(n1, 2 * j + 2); ++fj, ++count)
              for (int t = 0; t < nt; ++t) {
                r_sum[t] += d[(std::size_t(fi) * n1 + fj) * nt + t];
                w_sum[t] += w[(std::size_t(fi) * n1 + fj) * nt + t];
              }
          for (int t = 0; t < nt; ++t) {
            r_sum[t] /= count;
            w_sum[t] /= count;
          }
        }
    });
    PlsSettings coarse = settings;
    coarse.s_space = settings.s_space / 16.0;
    coarse.tolerance = settings.tolerance * settings.coarse_tightening;
    coarse.coarse_tightening = 1.0;  // coarser grids: the same tolerance
    PlsBuffers<Real> coarse_ws;
    solve_pls_in(plans, {m0, m1, nt}, {}, coarse_w, coarse, coarse_e, coarse_ws, coarse_r.data());
    coarse_ws = {};
    // e, interpolated bilinearly between the coarse cells' centres (constant beyond the outer
    // ones), into d.
    auto neighbours = [](int i, int m, int& low, int& high, double& low_weight) {
      const double at = (i - 0.5) / 2.0;  // fine cell i's centre in coarse cells
      low = int(std::floor(at));
      low_weight = low + 1 - at;
      high = std::min(m - 1, low + 1);
      low = std::max(0, low);
    };
    parallel_ranges(std::size_t(n0), 1, [&](std::size_t a, std::size_t e) {
      for (int i = int(a); i < int(e); ++i) {
        int i0, i1;
        double u;
        neighbours(i, m0, i0, i1, u);
        for (int j = 0; j < n1; ++j) {
          int j0, j1;
          double v;
          neighbours(j, m1, j0, j1, v);
          auto at = [&](int ci, int cj) { return &coarse_e[(std::size_t(ci) * m1 + cj) * nt]; };
          const double *e00 = at(i0, j0), *e01 = at(i0, j1), *e10 = at(i1, j0), *e11 = at(i1, j1);
          Real* out = d + (std::size_t(i) * n1 + j) * nt;
          for (int t = 0; t < nt; ++t)
            out[t] = Real(u * (v * e00[t] + (1 - v) * e01[t]) + (1 - u) * (v * e10[t] + (1 - v) * e11[t]));
        }
      }
    });
    // e's spectrum on every slot in d_hat (z's empty slots are spectra); then z += e and
    // r -= (W + P) e.
    in_chunks([&](std::size_t a, std::size_t e) { std::copy(d + a, d + e, d_hat + a); });
    plans.forward_space(shape, d_hat, {&all_slots, 1});
    each_frequency([&](std::size_t f) {
      for (int t = 0; t < nt; ++t) d_hat[f * nt + t] *= root_factor[f];
    });
    apply_operator([&](std::size_t f) {
      for (int t = 0; t < nt; ++t) {
        const std::size_t i = f * nt + t;
        r_hat[i] -= ad_hat[i];
        z[i] += slot_has_data[t] ? double(d[i]) : double(d_hat[i]);
      }
      return 0.0;
    });
  }
  // q_hat <- M r_hat for the frequencies of the group starting at f0, by their banded solves in
  // double (x: room for nt x lanes values); `update(f)`, if given, first brings frequency f's
  // rows up to date. Returns (r_hat . r_hat, r_hat . q_hat) over the group.
  auto precondition_group = [&](std::size_t f0, double* x, auto&& update) {
    const int used = int(std::min<std::size_t>(lanes, frequencies - f0));
    double rr_sum = 0, rq_sum = 0;
    for (int k = 0; k < lanes; ++k) {
      if (k >= used) {
        for (int t = 0; t < nt; ++t) x[std::size_t(t) * lanes + k] = 0.0;
        continue;
      }
      update(f0 + k);
      const Real* r = r_hat + (f0 + k) * nt;
      for (int t = 0; t < nt; ++t) {
        rr_sum += double(r[t]) * double(r[t]);
        x[std::size_t(t) * lanes + k] = double(r[t]);
      }
    }
    solve_group(f0 / lanes, x);
    for (int k = 0; k < used; ++k) {
      const Real* r = r_hat + (f0 + k) * nt;
      Real* q = q_hat + (f0 + k) * nt;
      for (int t = 0; t < nt; ++t) {
        q[t] = Real(x[std::size_t(t) * lanes + k]);
        rq_sum += double(r[t]) * double(q[t]);
      }
    }
    return std::array<double, 2>{rr_sum, rq_sum};
  };
  // Over all groups, in pieces of whole groups added in order.
  auto precondition = [&](auto&& update) {
    return deterministic_sums<2>(frequencies, frequency_grain, [&](std::size_t a, std::size_t e) {
      std::vector<double> x(std::size_t(nt) * lanes);
      std::array<double, 2> sums{0.0, 0.0};
      for (std::size_t f0 = a; f0 < e; f0 += lanes) {
        const auto group = precondition_group(f0, x.data(), update);
        sums[0] += group[0];
        sums[1] += group[1];
      }
      return sums;
    });
  };
  // d_hat <- q_hat + beta d_hat (q_hat alone on the first), and d <- its slots with data in
  // space, in one pass and one inverse transform.
  auto next_direction = [&](double beta, bool first) {
    each_frequency([&](std::size_t f) {
      Real* spectrum = d_hat + f * nt;
      Real* space = d + f * nt;
      for (int t = 0; t < nt; ++t) {
        spectrum[t] = first ? q_hat[f * nt + t] : Real(q_hat[f * nt + t] + beta * spectrum[t]);
        space[t] = Real(spectrum[t] * back_factor[f]);
      }
    });
    plans.inverse_space(shape, d, data_runs);
  };
  // Two 2-D transforms per iteration: the residual lives in the spectral domain (the dot
  // products are the same in both, the transform being orthonormal), so (W + P) d needs the
  // spectrum of W d only, and the direction goes back to space once for W d and z. The updates
  // of z and r, the preconditioner and the next direction's dot products are one pass over each
  // frequency's rows.
  auto [rr, rq] = precondition([](std::size_t) {});
  next_direction(0.0, true);
  for (int it = 0; it < settings.max_iterations; ++it) {
    result.relative_residual = std::sqrt(rr) / b_norm;
    if (result.relative_residual <= settings.tolerance) {
      result.converged = true;
      break;
    }
    // (W + P) d and d . (W + P) d, in the same pass.
    const double dad = apply_operator([&](std::size_t f) {
      double sum = 0;
      for (int t = 0; t < nt; ++t) sum += double(d_hat[f * nt + t]) * double(ad_hat[f * nt + t]);
      return sum;
    });
    if (!(dad > 0)) break;
    const double alpha = rq / dad;
    const auto [rr_next, rq_next] = precondition([&](std::size_t f) {
      double* z_row = z.data() + f * nt;
      const Real* d_row = d + f * nt;
      const Real* d_hat_row = d_hat + f * nt;
      const Real* ad_row = ad_hat + f * nt;
      Real* r_row = r_hat + f * nt;
      for (int t = 0; t < nt; ++t) {
        z_row[t] += alpha * (slot_has_data[t] ? d_row[t] : d_hat_row[t]);
        r_row[t] = Real(r_row[t] - alpha * ad_row[t]);
      }
    });
    const double beta = rq_next / rq;
    rr = rr_next;
    rq = rq_next;
    next_direction(beta, false);
    result.iterations = it + 1;
  }
  if (!result.converged) {
    result.relative_residual = std::sqrt(rr) / b_norm;
    result.converged = result.relative_residual <= settings.tolerance;
  }
  if (!empty_slots.empty()) {
    each_frequency([&](std::size_t f) {
      for (int t : empty_slots) z[f * nt + t] /= root_factor[f] * scale;
    });
    plans.inverse_space(shape, z.data(), empty_runs);
  }
  return result;
}

}  // namespace

PlsResult solve_pls(const DctPlanCache& plans, const Shape3& shape, std::span<const double> y,
                    std::span<const double> w, const PlsSettings& settings, std::span<double> z,
                    PlsWorkspace& ws) {
  return settings.single_precision ? solve_pls_in(plans, shape, y, w, settings, z, ws.narrow)
                                   : solve_pls_in(plans, shape, y, w, settings, z, ws.wide);
}

}  // namespace kalends::detail
