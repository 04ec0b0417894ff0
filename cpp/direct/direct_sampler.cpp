#include "direct/direct_sampler.hpp"

#include <algorithm>
#include <atomic>
#include <chrono>
#include <thread>
#include <cmath>
#include <cstring>
#include <limits>
#include <string>

#if defined(__unix__) || defined(__APPLE__)
#include <time.h>
#define SL_THREAD_CLOCK 1
#endif

#include "core/error.hpp"
#include "core/path.hpp"
#include "core/random.hpp"

// Every instruction-set version must round alike, so CMakeLists.txt builds this file with
// -ffp-contract=off (no fused multiply-add) and -fno-math-errno (sqrt vectorises).

// Kernels are compiled for several instruction sets and picked at load time by CPU features (GCC/Clang function
// multi-versioning on x86-64 ELF); elsewhere they are plain C++ that the compiler vectorises.
#if defined(__x86_64__) && defined(__ELF__) && (defined(__GNUC__) || defined(__clang__)) && !defined(STRATALOOM_NO_CLONES)
#define SL_KERNEL __attribute__((target_clones("default", "arch=x86-64-v3", "arch=x86-64-v4")))
#else
#define SL_KERNEL
#endif

namespace sl::direct {

namespace {

// CPU time of the calling thread in seconds (0 where the platform has no thread clock).
double thread_cpu_seconds() noexcept {
#if defined(SL_THREAD_CLOCK) && defined(CLOCK_THREAD_CPUTIME_ID)
  timespec ts{};
  if (clock_gettime(CLOCK_THREAD_CPUTIME_ID, &ts) == 0) return static_cast<double>(ts.tv_sec) + 1e-9 * static_cast<double>(ts.tv_nsec);
#endif
  return 0.0;
}

// Lags evaluated between two checks of the early exit.
constexpr int kChunk = 12;
// Extra slots beyond each end of the stored arrays, on top of the lag reach, for the last block.
constexpr std::int64_t kTail = 2 * kWideLanes;

std::string str(std::int64_t v) { return std::to_string(v); }

}  // namespace

TrainingImage::TrainingImage(const Ijk& shape, const std::vector<const float*>& values, const std::vector<Kind>& kinds,
                             const Offset& reach)
    : shape_(shape), reach_(reach), kinds_(kinds) {
  require(!values.empty() && values.size() == kinds.size(), "training_image",
          "must hold one kind per variable and at least one variable.");
  require(static_cast<int>(values.size()) <= kMaxVariables, "training_image",
          "must hold at most " + str(kMaxVariables) + " variables.");
  double padded = 1;
  for (int a = 0; a < 3; ++a) {
    require(shape[a] >= 1, "training_image", "must have a positive size along every axis.");
    require(reach[a] >= 0 && reach[a] <= 4096, "search_radius", "must hold radii in [0, 4096] cells.");
    padded_[a] = shape[a] + 2 * Index{reach[a]};
    padded *= static_cast<double>(padded_[a]);
  }
  require(padded <= 2e9, "training_image", "is too large once padded by the search radius (over 2e9 cells).");
  const std::int64_t total = padded_[0] * padded_[1] * padded_[2];
  // Stride: one neighbourhood width along the fastest axis the lags move along.
  const std::int64_t axis_stride[3] = {padded_[1] * padded_[2], padded_[2], 1};
  stride_ = 1;
  for (int a = 2; a >= 0; --a)
    if (reach[a] > 0) {
      stride_ = (2 * std::int64_t{reach[a]} + 1) * axis_stride[a];
      break;
    }
  stride_ = std::min(stride_, total);
  phase_length_ = (total + stride_ - 1) / stride_;
  const std::int64_t slots = stride_ * phase_length_;
  const std::int64_t reach_delta = padded_delta(reach);
  margin_ = kTail + reach_delta / stride_ + 2;
  const auto stored = static_cast<std::size_t>(slots + 2 * margin_);
  informed_.assign(stored, 0);
  values_.resize(values.size());
  const Index n = size();
  for (std::size_t v = 0; v < values.size(); ++v) {
    require(values[v] != nullptr, "training_image", "is missing the data of a variable.");
    const bool cat = kinds[v] == Kind::categorical;
    auto& out = values_[v];
    out.assign(stored, cat ? kMaskedCategory : kMaskedContinuous);
    const float* in = values[v];
    for (Index i = 0; i < n; ++i) {
      const float x = in[i];
      const bool ok = cat ? (x >= 0.0f) : !std::isnan(x);  // NaN >= 0 is false
      if (!ok) continue;
      require(std::isfinite(x), "training_image", "must hold finite values or NaN (masked).");
      const auto e = static_cast<std::size_t>(slot(padded_index(i)) + margin_);
      out[e] = x;
      informed_[e] |= std::uint32_t{1} << v;
    }
  }
  // Byte copies of the categorical variables whose codes all fit in a byte (same slots).
  codes_.resize(values.size());
  for (std::size_t v = 0; v < values.size(); ++v) {
    if (kinds[v] != Kind::categorical) continue;
    const auto& f = values_[v];
    bool fits = true;
    for (std::size_t e = 0; e < stored && fits; ++e)
      fits = f[e] == kMaskedCategory || (f[e] >= 0.0f && f[e] <= float(kMaxByteCode) && f[e] == std::floor(f[e]));
    if (!fits) continue;
    auto& c = codes_[v];
    c.resize(stored);
    for (std::size_t e = 0; e < stored; ++e) c[e] = f[e] == kMaskedCategory ? kMaskedByte : static_cast<std::uint8_t>(f[e]);
  }
  std::vector<std::uint8_t> real(static_cast<std::size_t>(slots), 0);
  for (Index i = 0; i < n; ++i) real[static_cast<std::size_t>(slot(padded_index(i)))] = 1;
  real_before_.assign(static_cast<std::size_t>(slots + 1), 0);
  for (std::int64_t e = 0; e < slots; ++e)
    real_before_[static_cast<std::size_t>(e + 1)] = real_before_[static_cast<std::size_t>(e)] + real[static_cast<std::size_t>(e)];
}

std::int64_t TrainingImage::padded_index(Index i) const noexcept {
  const Index x = i % shape_[2];
  const Index r = i / shape_[2];
  return ((r / shape_[1] + reach_[0]) * padded_[1] + (r % shape_[1] + reach_[1])) * padded_[2] + reach_[2] + x;
}

Index TrainingImage::real_index(std::int64_t e) const noexcept {
  const std::int64_t p = position(e);
  const Index x = p % padded_[2] - reach_[2];
  const Index y = (p / padded_[2]) % padded_[1] - reach_[1];
  const Index z = p / (padded_[2] * padded_[1]) - reach_[0];
  if (x < 0 || x >= shape_[2] || y < 0 || y >= shape_[1] || z < 0 || z >= shape_[0]) return -1;
  return (z * shape_[1] + y) * shape_[2] + x;
}

Index TrainingImage::count_informed(std::uint32_t need) const noexcept {
  Index count = 0;
  for (Index i = 0; i < size(); ++i)
    if ((informed()[slot(padded_index(i))] & need) == need) ++count;
  return count;
}

namespace detail {

#if defined(__GNUC__) || defined(__clang__)
// 16 lanes as one vector value (GCC/Clang vector extensions): the compiler maps it to one AVX-512,
// two AVX or four SSE registers, with no branch per lane.
typedef float Lanes __attribute__((vector_size(kLanes * sizeof(float))));
typedef std::int32_t LaneMask __attribute__((vector_size(kLanes * sizeof(float))));

typedef std::uint8_t GroupCodes __attribute__((vector_size(kLanes)));
typedef std::int8_t GroupBytes __attribute__((vector_size(kLanes)));

// Unaligned load of 16 lanes (a macro: a function returning a vector would change ABI per target).
#define SL_LOAD_LANES(dst, src) std::memcpy(&(dst), (src), sizeof(Lanes))
// Lane-wise m ? a : b.
#define SL_SELECT(m, a, b) ((Lanes)((((LaneMask)(a)) & (m)) | (((LaneMask)(b)) & ~(m))))
#define SL_SELECT_INT(m, a, b) (((a) & (m)) | ((b) & ~(m)))

template <class T>
[[gnu::always_inline]] inline bool all_ones(const T& m) noexcept {
  std::uint64_t w[sizeof(T) / 8];
  std::memcpy(w, &m, sizeof w);
  std::uint64_t r = ~std::uint64_t{0};
  for (std::size_t i = 0; i < sizeof(T) / 8; ++i) r &= w[i];
  return r == ~std::uint64_t{0};
}
[[gnu::always_inline]] inline bool all_set(const LaneMask& m) noexcept { return all_ones(m); }

// Lanes g * kLanes .. of the block at p whose TI cell informs every variable the node needs and,
// in a block cut short, that lie inside it. (Only a short block gets the lane test: GCC turns the
// constant lane numbers into one scalar compare per lane.)
// (Written through a reference: a 64-byte vector returned by value trips GCC's ABI warning.)
[[gnu::always_inline]] inline void valid_lanes(const NodeView& node, std::int64_t p, int lanes, int g,
                                               LaneMask& valid) noexcept {
  static constexpr std::int32_t kIota[kLanes] = {0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15};
  LaneMask informed;
  std::memcpy(&informed, node.informed + p + g * kLanes, sizeof informed);
  const LaneMask need = LaneMask{} + static_cast<std::int32_t>(node.need);
  valid = (informed & need) == need;
  if (lanes < (g + 1) * kLanes) {
    LaneMask iota;
    std::memcpy(&iota, kIota, sizeof iota);
    valid &= iota < lanes - g * kLanes;
  }
}

SL_KERNEL bool evaluate_block(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                              std::int64_t& comparisons) {
  LaneMask valid;
  valid_lanes(node, p, lanes, 0, valid);
  const Lanes inf = Lanes{} + std::numeric_limits<float>::infinity();
  const Lanes zero = Lanes{};
  const Lanes one = zero + 1.0f;
  const Lanes minus_one = zero - 1.0f;
  // (A block with no usable candidate is skipped by the caller's count of real cells; one whose real
  // cells all lack a needed variable is left to the lane masks: it ends as all +inf.)
  const bool prune = best < std::numeric_limits<float>::infinity();
  const Lanes best_v = zero + best;
  Lanes base = zero;
  for (int a = 0; a < node.count; ++a) {
    const LagSet& lags = *node.lags[static_cast<std::size_t>(a)];
    const float* ti = node.data[static_cast<std::size_t>(a)] + p;
    const bool cat = node.categorical[static_cast<std::size_t>(a)];
    const float sum = node.sum[static_cast<std::size_t>(a)];
    Lanes lim = minus_one;
    if (prune) {
      // A candidate is out once this variable alone adds more than the room left below `best`.
      const Lanes room = (best_v - base) * node.inv_share[static_cast<std::size_t>(a)];
      const Lanes scaled = cat ? room * sum : room * room * sum;
      const LaneMask open = valid & (room > zero);
      lim = SL_SELECT(open, scaled, minus_one);
    }
    // Two partial sums (even and odd lags) halve the add latency chain; their order is fixed.
    Lanes acc = zero, even = zero, odd = zero;
    const std::int64_t* delta = lags.delta.data();
    const float* value = lags.value.data();
    const float* weight = lags.weight.data();
    const std::uint8_t* codes = cat && node.codes[static_cast<std::size_t>(a)] != nullptr
                                    ? node.codes[static_cast<std::size_t>(a)] + p
                                    : nullptr;
    const std::uint8_t* code = lags.code.data();
    for (int k0 = 0; k0 < lags.size; k0 += kChunk) {
      const int k1 = std::min(k0 + kChunk, lags.size);
      if (codes != nullptr) {
        // Byte codes: 16 bytes per lag instead of 64, the same float sums.
        for (int k = k0; k < k1; ++k) {
          GroupCodes t;
          std::memcpy(&t, codes + delta[k], sizeof t);
          const LaneMask differs = __builtin_convertvector((GroupBytes)(t != code[k]), LaneMask);
          const Lanes term = (Lanes)(differs & (LaneMask)(zero + weight[k]));
          if ((k & 1) == 0)
            even += term;
          else
            odd += term;
        }
      } else if (cat) {
        for (int k = k0; k < k1; ++k) {
          Lanes t;
          SL_LOAD_LANES(t, ti + delta[k]);
          const LaneMask differs = t != value[k];
          const Lanes term = (Lanes)(differs & (LaneMask)(zero + weight[k]));
          if ((k & 1) == 0)
            even += term;
          else
            odd += term;
        }
      } else {
        for (int k = k0; k < k1; ++k) {
          Lanes t;
          SL_LOAD_LANES(t, ti + delta[k]);
          const Lanes d = t - value[k];
          const Lanes sq = d * d;
          const Lanes clamped = SL_SELECT(sq < one, sq, one);
          const Lanes term = weight[k] * clamped;  // separate statements: no fused multiply-add
          if ((k & 1) == 0)
            even += term;
          else
            odd += term;
        }
      }
      acc = even + odd;
      comparisons += std::int64_t{lanes} * (k1 - k0);
      if (prune) {
        const LaneMask out_of_reach = acc > lim;
        if (all_set(out_of_reach)) return false;
      }
    }
    float m[kLanes];
    const Lanes mean = acc / sum;
    std::memcpy(m, &mean, sizeof m);
    if (!cat)
      for (int j = 0; j < kLanes; ++j) m[j] = std::sqrt(m[j]);
    Lanes part;
    std::memcpy(&part, m, sizeof part);
    const Lanes weighted = node.share[static_cast<std::size_t>(a)] * part;
    base += weighted;
  }
  const Lanes result = SL_SELECT(valid, base, inf);
  std::memcpy(out, &result, sizeof result);
  return true;
}
// The byte kernel: kWideLanes candidates per vector value of byte codes. Codes are compared
// byte-wise and mismatches counted in int8 lanes (lag sets of at most kMaxByteLags lags); the float
// parts run per group of kLanes lanes (no vector type wider than 64 bytes, which GCC would split
// element by element). With every lag weighing 1 the float kernel's sums are exact integers, so
// converting the count gives its `acc` exactly, and its early exit `acc > lim` is
// `count > floor(lim)` in integers.
typedef std::uint8_t WideCodes __attribute__((vector_size(kWideLanes)));
typedef std::int8_t WideBytes __attribute__((vector_size(kWideLanes)));
constexpr int kGroups = kWideLanes / kLanes;

SL_KERNEL bool evaluate_wide(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                             std::int64_t& comparisons) {
  const Lanes zero = Lanes{};
  LaneMask valid[kGroups];
  Lanes base[kGroups];
  for (int g = 0; g < kGroups; ++g) {
    valid_lanes(node, p, lanes, g, valid[g]);
    base[g] = zero;
  }
  const bool prune = best < std::numeric_limits<float>::infinity();
  const Lanes best_v = zero + best;
  for (int a = 0; a < node.count; ++a) {
    const LagSet& lags = *node.lags[static_cast<std::size_t>(a)];
    const std::uint8_t* ti = node.codes[static_cast<std::size_t>(a)] + p;
    const float sum = node.sum[static_cast<std::size_t>(a)];
    // lim as in evaluate_block (-1: out whatever the count), floored and capped at kMaxByteLags.
    WideBytes lim = WideBytes{} - 1;
    if (prune) {
      for (int g = 0; g < kGroups; ++g) {
        const Lanes room = (best_v - base[g]) * node.inv_share[static_cast<std::size_t>(a)];
        const Lanes scaled = room * sum;
        const LaneMask open = valid[g] & (room > zero);
        const Lanes capped = SL_SELECT(scaled < float(kMaxByteLags), scaled, zero + float(kMaxByteLags));
        const LaneMask whole = __builtin_convertvector(capped, LaneMask);  // truncation = floor here
        const GroupBytes part = __builtin_convertvector(SL_SELECT_INT(open, whole, LaneMask{} - 1), GroupBytes);
        std::memcpy(reinterpret_cast<char*>(&lim) + g * kLanes, &part, sizeof part);
      }
    }
    WideBytes match = WideBytes{};  // minus the matches so far
    WideBytes miss = WideBytes{};
    const std::int64_t* delta = lags.delta.data();
    const std::uint8_t* code = lags.code.data();
    for (int k0 = 0; k0 < lags.size; k0 += kChunk) {
      const int k1 = std::min(k0 + kChunk, lags.size);
      for (int k = k0; k < k1; ++k) {
        WideCodes t;
        std::memcpy(&t, ti + delta[k], sizeof t);
        match += (WideBytes)(t == code[k]);
      }
      miss = static_cast<std::int8_t>(k1) + match;
      comparisons += std::int64_t{lanes} * (k1 - k0);
      if (prune && all_ones(miss > lim)) return false;
    }
    for (int g = 0; g < kGroups; ++g) {
      GroupBytes m;
      std::memcpy(&m, reinterpret_cast<const char*>(&miss) + g * kLanes, sizeof m);
      const Lanes mean = __builtin_convertvector(m, Lanes) / sum;
      const Lanes weighted = node.share[static_cast<std::size_t>(a)] * mean;
      base[g] += weighted;
    }
  }
  const Lanes inf = zero + std::numeric_limits<float>::infinity();
  for (int g = 0; g < kGroups; ++g) {
    const Lanes result = SL_SELECT(valid[g], base[g], inf);
    std::memcpy(out + g * kLanes, &result, sizeof result);
  }
  return true;
}
// The screening kernel: as evaluate_wide, with integer weights summed in int16 lanes (two halves of
// 32 lanes) and a lower bound of the distance instead of the distance.
typedef std::int16_t HalfCounts __attribute__((vector_size(kWideLanes)));
typedef std::int8_t HalfBytes __attribute__((vector_size(kWideLanes / 2)));
typedef std::int16_t GroupCounts __attribute__((vector_size(2 * kLanes)));

// Margin of the bound: the float kernel's sums, division and products round by far less.
constexpr float kScreenMargin = 1.0f - 1e-3f;

SL_KERNEL bool screen_wide(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                           std::int64_t& comparisons) {
  const Lanes zero = Lanes{};
  LaneMask valid[kGroups];
  Lanes bound[kGroups];
  for (int g = 0; g < kGroups; ++g) {
    valid_lanes(node, p, lanes, g, valid[g]);
    bound[g] = zero;
  }
  const bool prune = best < std::numeric_limits<float>::infinity();
  const Lanes best_v = zero + best;
  for (int a = 0; a < node.count; ++a) {
    const LagSet& lags = *node.lags[static_cast<std::size_t>(a)];
    const std::uint8_t* ti = node.codes[static_cast<std::size_t>(a)] + p;
    const std::size_t ai = static_cast<std::size_t>(a);
    // Bound of this variable's part: scale * (integer mismatch sum).
    const float scale = node.share[ai] * lags.unit / node.sum[ai] * kScreenMargin;
    // A lane is out once its integer sum exceeds floor((best - bound) / scale) (-1: out already).
    HalfCounts lim[2] = {HalfCounts{} - 1, HalfCounts{} - 1};
    if (prune) {
      for (int g = 0; g < kGroups; ++g) {
        const Lanes room = (best_v - bound[g]) / scale;
        const LaneMask open = valid[g] & (room >= zero);
        const Lanes capped = SL_SELECT(room < 32767.0f, room, zero + 32767.0f);
        const LaneMask whole = __builtin_convertvector(capped, LaneMask);
        const GroupCounts part = __builtin_convertvector(SL_SELECT_INT(open, whole, LaneMask{} - 1), GroupCounts);
        std::memcpy(reinterpret_cast<char*>(&lim[g / 2]) + (g % 2) * sizeof part, &part, sizeof part);
      }
    }
    HalfCounts sum[2] = {HalfCounts{}, HalfCounts{}};
    const std::int64_t* delta = lags.delta.data();
    const std::uint8_t* code = lags.code.data();
    const std::int16_t* iw = lags.iweight.data();
    for (int k0 = 0; k0 < lags.size; k0 += kChunk) {
      const int k1 = std::min(k0 + kChunk, lags.size);
      for (int k = k0; k < k1; ++k) {
        WideCodes t;
        std::memcpy(&t, ti + delta[k], sizeof t);
        const WideBytes differs = (WideBytes)(t != code[k]);
        HalfBytes d0, d1;
        std::memcpy(&d0, &differs, sizeof d0);
        std::memcpy(&d1, reinterpret_cast<const char*>(&differs) + sizeof d0, sizeof d1);
        const HalfCounts w = HalfCounts{} + iw[k];
        sum[0] += __builtin_convertvector(d0, HalfCounts) & w;
        sum[1] += __builtin_convertvector(d1, HalfCounts) & w;
      }
      comparisons += std::int64_t{lanes} * (k1 - k0);
      if (prune && all_ones(sum[0] > lim[0]) && all_ones(sum[1] > lim[1])) return false;
    }
    for (int g = 0; g < kGroups; ++g) {
      GroupCounts c;
      std::memcpy(&c, reinterpret_cast<const char*>(&sum[g / 2]) + (g % 2) * sizeof c, sizeof c);
      const Lanes part = scale * __builtin_convertvector(c, Lanes);
      bound[g] += part;
    }
  }
  const Lanes inf = zero + std::numeric_limits<float>::infinity();
  for (int g = 0; g < kGroups; ++g) {
    const Lanes result = SL_SELECT(valid[g], bound[g], inf);
    std::memcpy(out + g * kLanes, &result, sizeof result);
  }
  return true;
}
#else
bool evaluate_block(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                    std::int64_t& comparisons) {
  bool valid[kLanes], any = false;
  for (int j = 0; j < kLanes; ++j) {
    valid[j] = j < lanes && (node.informed[p + j] & node.need) == node.need;
    any |= valid[j];
  }
  if (!any) return false;
  const bool prune = best < std::numeric_limits<float>::infinity();
  float base[kLanes] = {}, acc[kLanes], lim[kLanes], even[kLanes], odd[kLanes];
  for (int a = 0; a < node.count; ++a) {
    const LagSet& lags = *node.lags[static_cast<std::size_t>(a)];
    const float* ti = node.data[static_cast<std::size_t>(a)] + p;
    const bool cat = node.categorical[static_cast<std::size_t>(a)];
    const float sum = node.sum[static_cast<std::size_t>(a)];
    for (int j = 0; j < kLanes; ++j) {
      const float room = (best - base[j]) * node.inv_share[static_cast<std::size_t>(a)];
      lim[j] = !prune || !valid[j] || !(room > 0) ? -1.0f : (cat ? room * sum : room * room * sum);
      acc[j] = even[j] = odd[j] = 0;
    }
    for (int k0 = 0; k0 < lags.size; k0 += kChunk) {
      const int k1 = std::min(k0 + kChunk, lags.size);
      for (int k = k0; k < k1; ++k) {
        const float* t = ti + lags.delta[static_cast<std::size_t>(k)];
        const float v = lags.value[static_cast<std::size_t>(k)], w = lags.weight[static_cast<std::size_t>(k)];
        float* part = (k & 1) == 0 ? even : odd;
        for (int j = 0; j < kLanes; ++j) {
          const float d = t[j] - v;
          const float term = cat ? (t[j] != v ? w : 0.0f) : w * std::min(d * d, 1.0f);
          part[j] += term;
        }
      }
      for (int j = 0; j < kLanes; ++j) acc[j] = even[j] + odd[j];
      comparisons += std::int64_t{lanes} * (k1 - k0);
      if (prune) {
        bool all_out = true;
        for (int j = 0; j < kLanes; ++j) all_out &= acc[j] > lim[j];
        if (all_out) return false;
      }
    }
    for (int j = 0; j < kLanes; ++j) {
      const float m = acc[j] / sum;
      const float part = node.share[static_cast<std::size_t>(a)] * (cat ? m : std::sqrt(m));
      base[j] += part;
    }
  }
  for (int j = 0; j < kLanes; ++j) out[j] = valid[j] ? base[j] : std::numeric_limits<float>::infinity();
  return true;
}
#endif

#if !(defined(__GNUC__) || defined(__clang__))
bool evaluate_wide(const NodeView& node, std::int64_t p, int lanes, float best, float* out,
                   std::int64_t& comparisons) {
  // Plain C++: the float kernel per group of kLanes; an abandoned group reads +inf (none of its
  // candidates could beat `best`, which is above the acceptance distance).
  bool any = false;
  for (int g = 0; g < kWideLanes; g += kLanes) {
    const int n = std::clamp(lanes - g, 0, kLanes);
    const bool ok = n > 0 && evaluate_block(node, p + g, n, best, out + g, comparisons);
    if (!ok) std::fill(out + g, out + g + kLanes, std::numeric_limits<float>::infinity());
    any |= ok;
  }
  return any;
}
#endif

#if !(defined(__GNUC__) || defined(__clang__))
bool screen_wide(const NodeView&, std::int64_t, int, float, float* out, std::int64_t&) {
  // Plain C++: no screening (every bound 0, so every block is evaluated exactly).
  std::fill(out, out + kWideLanes, 0.0f);
  return true;
}
#endif

Index scan_start(std::uint64_t seed, Index cell, Index n) noexcept {
  const double u = to_unit(random_bits(seed, 0, static_cast<std::uint64_t>(cell), Stream::start));
  const auto s = static_cast<Index>(u * static_cast<double>(n));
  return std::min(s, n - 1);
}

}  // namespace detail

namespace {

// Per-worker scratch and counters, on their own cache lines.
struct alignas(64) Worker {
  std::vector<detail::LagSet> lags;
  detail::NodeView view;
  Stats stats;
};

// One search-window offset seen from the grid and from the TI.
struct Look {
  Offset lag;
  std::int64_t grid_delta;
  std::int64_t ti_delta;  // padded offset = q * stride + r, 0 <= r < stride
  std::int64_t q;
  std::int64_t r;
  float weight;
};

// One zone: its TI, parameters and search window seen from the grid and from the TI.
struct ZoneData {
  const TrainingImage* ti = nullptr;
  const Params* params = nullptr;
  std::vector<Look> looks;
  Index limit = 1;
  float accept = 0;
};

// Splits a padded offset d as q * stride + r with 0 <= r < stride.
inline void split_delta(std::int64_t d, std::int64_t st, std::int64_t& q, std::int64_t& r) noexcept {
  q = d >= 0 ? d / st : -((-d + st - 1) / st);
  r = d - q * st;
}

class Simulation {
 public:
  Simulation(const std::vector<const TrainingImage*>& tis, const std::vector<Params>& params, const std::int32_t* zone,
             const Geometry& geometry, const Grid& grid, const std::vector<float*>& state,
             const std::vector<bool>& auxiliary, std::int64_t* source)
      : grid_(grid), state_(state), auxiliary_(auxiliary), zone_(zone), geometry_(geometry), source_(source) {
    nvar_ = tis[0]->variables();
    for (std::size_t z = 0; z < tis.size(); ++z) {
      ZoneData zd;
      zd.ti = tis[z];
      zd.params = &params[z];
      const TrainingImage& ti = *tis[z];
      zd.looks.reserve(params[z].search.size());
      for (const Offset& o : params[z].search) {
        const double h = std::sqrt(double(o[0]) * o[0] + double(o[1]) * o[1] + double(o[2]) * o[2]);
        const auto w = static_cast<float>(std::pow(1.0 + h, -params[z].lag_power));
        const std::int64_t d = ti.padded_delta(o);
        std::int64_t q = 0, r = 0;
        split_delta(d, ti.stride(), q, r);
        zd.looks.push_back({o, (std::int64_t{o[0]} * grid.shape()[1] + o[1]) * grid.shape()[2] + o[2], d, q, r, w});
      }
      const Index n = ti.size();
      zd.limit = std::clamp<Index>(static_cast<Index>(std::ceil(params[z].scan_fraction * static_cast<double>(n))), 1, n);
      zd.accept = static_cast<float>(params[z].accept_distance);
      max_neighbors_ = std::max(max_neighbors_, params[z].neighbors);
      zones_.push_back(std::move(zd));
    }
  }

  Worker make_worker() const {
    Worker w;
    w.lags.resize(static_cast<std::size_t>(nvar_));
    for (auto& l : w.lags) {
      const auto cap = static_cast<std::size_t>(max_neighbors_) + 1;
      l.delta.resize(cap);
      l.q.resize(cap);
      l.r.resize(cap);
      l.value.resize(cap);
      l.weight.resize(cap);
      l.code.resize(cap);
      l.iweight.resize(cap);
    }
    return w;
  }

  // Mask of the variables a node must receive (non-auxiliary and unknown).
  std::uint32_t need_at(Index c) const noexcept {
    std::uint32_t need = 0;
    for (int v = 0; v < nvar_; ++v)
      if (!auxiliary_[static_cast<std::size_t>(v)] && std::isnan(state_[static_cast<std::size_t>(v)][c]))
        need |= std::uint32_t{1} << v;
    return need;
  }

  const ZoneData& zone_of(Index c) const noexcept {
    return zones_[zone_ ? static_cast<std::size_t>(zone_[c]) : std::size_t{0}];
  }

  // Simulates the node at path position `pos`; false when the run was cancelled meanwhile.
  bool node(Index c, std::int64_t pos, Worker& w) const {
    const std::uint32_t need = need_at(c);
    if (!need) return true;
    const ZoneData& zd = zone_of(c);
    if (!gather(c, pos, zd, w)) return false;
    Index src = -1;
    float dist = 0;
    const bool accepted = scan(c, need, zd, w, src, dist);
    if (src < 0) throw ParameterError("training_image", "has no cell informed in every variable a node needs.");
    const TrainingImage& ti = *zd.ti;
    const std::int64_t e = ti.slot(ti.padded_index(src));
    for (int v = 0; v < nvar_; ++v)
      if (need & (std::uint32_t{1} << v)) state_[static_cast<std::size_t>(v)][c] = ti.data(v)[e];
    source_[c] = src;
    ++w.stats.nodes;
    w.stats.distance_sum += dist;
    if (accepted) {
      ++w.stats.accepted;
      if (dist == 0.0f) ++w.stats.exact;
    }
    return true;
  }

  // Path order and completion flags: cell -> position on the path (-1 when not simulated), the
  // variables that node will receive, and whether it is done. Set before the run.
  void set_schedule(const std::int64_t* order, const std::uint32_t* need_of, const std::atomic<std::uint8_t>* done,
                    const WorkControl* ctl) {
    order_ = order;
    need_of_ = need_of;
    done_ = done;
    ctl_ = ctl;
  }

 private:
  // Waits until the node at cell g is done; false when the run is cancelled first.
  bool wait_for(Index g, Worker& w) const {
    if (done_[g].load(std::memory_order_acquire)) return true;
    ++w.stats.waits;
    const auto t0 = std::chrono::steady_clock::now();
    for (int spin = 0;; ++spin) {
      if (done_[g].load(std::memory_order_acquire)) break;
      if (ctl_->cancelled()) return false;
      if (spin >= 64) std::this_thread::yield();
    }
    w.stats.wait_seconds += std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
    return true;
  }

  // The TI lag compared with grid lag `lag` at a node of class `cls`: rint(M lag), half to even
  // (the default rounding mode), as padded offset split into q and r.
  void turned(const Offset& lag, const double* m, const TrainingImage& ti, std::int64_t& d, std::int64_t& q,
              std::int64_t& r) const {
    Offset t{};
    for (int a = 0; a < 3; ++a) {
      const double x = m[3 * a] * lag[0] + m[3 * a + 1] * lag[1] + m[3 * a + 2] * lag[2];
      const double k = std::nearbyint(x);
      if (std::abs(k) > ti.reach()[a])
        throw ParameterError("rotation", "(with 'affinity') turns a lag beyond the padding sized for it: an internal "
                                         "error; please report it with the rotation and affinity used.");
      t[a] = static_cast<std::int32_t>(k);
    }
    d = ti.padded_delta(t);
    split_delta(d, ti.stride(), q, r);
  }

  // The n nearest informed nodes per variable: the node itself when informed, then the search
  // window in its order (nearest first), stopping once every variable has n.
  // Reads exactly what a one-thread run in path order would see: a cell that is a node of the path
  // counts only when it comes earlier on the path, and then its values are waited for.
  bool gather(Index c, std::int64_t pos, const ZoneData& zd, Worker& w) const {
    const Params& params = *zd.params;
    const TrainingImage& ti = *zd.ti;
    const int n = params.neighbors;
    const double* m = geometry_.cls ? geometry_.matrices.data() + 9 * static_cast<std::size_t>(geometry_.cls[c]) : nullptr;
    int open = 0;
    for (int v = 0; v < nvar_; ++v) {
      auto& l = w.lags[static_cast<std::size_t>(v)];
      l.size = 0;
      l.weight_sum = 0;
      const float x = state_[static_cast<std::size_t>(v)][c];
      if (!std::isnan(x)) {
        l.delta[0] = 0;
        l.q[0] = 0;
        l.r[0] = 0;
        l.value[0] = x;
        l.weight[0] = 1.0f;
        l.size = 1;
        l.weight_sum = 1.0;
      }
      if (l.size < n) ++open;
    }
    const Ijk at = grid_.cell(c);
    const Ijk& shape = grid_.shape();
    for (const Look& look : zd.looks) {
      if (open == 0) break;
      const Index z = at[0] + look.lag[0], y = at[1] + look.lag[1], x = at[2] + look.lag[2];
      if (z < 0 || z >= shape[0] || y < 0 || y >= shape[1] || x < 0 || x >= shape[2]) continue;
      const Index g = c + look.grid_delta;
      const std::int64_t og = order_[g];
      // A node later on the path has only its given variables yet; an earlier one must be done.
      const std::uint32_t pending = og > pos ? need_of_[g] : 0;
      if (og >= 0 && og < pos && !wait_for(g, w)) return false;
      std::int64_t d = look.ti_delta, q = look.q, r = look.r;
      bool placed = m == nullptr;
      for (int v = 0; v < nvar_; ++v) {
        auto& l = w.lags[static_cast<std::size_t>(v)];
        if (l.size >= n || (pending & (std::uint32_t{1} << v))) continue;
        const float val = state_[static_cast<std::size_t>(v)][g];
        if (std::isnan(val)) continue;
        if (!placed) {
          turned(look.lag, m, ti, d, q, r);
          placed = true;
        }
        const auto k = static_cast<std::size_t>(l.size++);
        l.delta[k] = d;
        l.q[k] = q;
        l.r[k] = r;
        l.value[k] = val;
        l.weight[k] = look.weight;
        l.weight_sum += look.weight;
        if (l.size == n) --open;
      }
    }
    double total = 0;
    for (int v = 0; v < nvar_; ++v)
      if (w.lags[static_cast<std::size_t>(v)].size > 0) total += params.weights[static_cast<std::size_t>(v)];
    auto& view = w.view;
    view.informed = ti.informed();
    view.count = 0;
    view.bytes = true;
    view.screen = true;
    for (int v = 0; v < nvar_; ++v) {
      const auto& l = w.lags[static_cast<std::size_t>(v)];
      if (l.size == 0) continue;
      const auto a = static_cast<std::size_t>(view.count++);
      view.data[a] = ti.data(v);
      view.lags[a] = &l;
      view.share[a] = static_cast<float>(params.weights[static_cast<std::size_t>(v)] / total);
      view.inv_share[a] = 1.0f / view.share[a];
      view.sum[a] = static_cast<float>(l.weight_sum);
      view.categorical[a] = ti.kind(v) == Kind::categorical;
      view.codes[a] = byte_codes(ti, v, w.lags[static_cast<std::size_t>(v)]);
      view.bytes = view.bytes && view.codes[a] != nullptr && counts_exact(l);
      view.screen = view.screen && view.codes[a] != nullptr;
      if (view.codes[a] != nullptr) integer_weights(w.lags[static_cast<std::size_t>(v)]);
    }
    view.screen = view.screen && !view.bytes;
    return true;
  }

  // LagSet::iweight and unit for screen_wide: floor(w / unit) with unit = weight_sum / 32767, so
  // the integers of any set of lags sum to at most 32767 and, times unit, to at most their weights.
  static void integer_weights(detail::LagSet& l) {
    const double unit = l.weight_sum / 32767.0;
    for (int k = 0; k < l.size; ++k)
      l.iweight[static_cast<std::size_t>(k)] =
          static_cast<std::int16_t>(std::floor(static_cast<double>(l.weight[static_cast<std::size_t>(k)]) / unit));
    // Rounded down, so unit * integer <= weight also in float.
    l.unit = std::nextafter(static_cast<float>(unit), 0.0f);
  }

  // Whether mismatch counts give the float kernel's sums exactly: every lag weighs 1 and the
  // count fits the byte kernel's int8 lanes.
  static bool counts_exact(const detail::LagSet& l) {
    if (l.size > kMaxByteLags) return false;
    for (int k = 0; k < l.size; ++k)
      if (l.weight[static_cast<std::size_t>(k)] != 1.0f) return false;
    return true;
  }

  // The TI's byte codes of variable v (categorical, codes fit a byte), with the node values put
  // into `l.code`; null otherwise.
  static const std::uint8_t* byte_codes(const TrainingImage& ti, int v, detail::LagSet& l) {
    const std::uint8_t* codes = ti.codes(v);
    if (codes == nullptr) return nullptr;
    for (int k = 0; k < l.size; ++k) {
      const float x = l.value[static_cast<std::size_t>(k)];
      // The float kernel compares x with the stored floats: a code matches itself, kMaskedCategory
      // matches masked cells, anything else matches nothing.
      l.code[static_cast<std::size_t>(k)] =
          x == kMaskedCategory ? kMaskedByte
          : (x >= 0.0f && x <= float(kMaxByteCode) && x == std::floor(x)) ? static_cast<std::uint8_t>(x)
                                                                          : kForeignByte;
    }
    return codes;
  }

  // Sets the slot offsets of every lag for scan phase `phase`.
  static void enter_phase(const TrainingImage& ti, Worker& w, std::int64_t phase) {
    for (auto& l : w.lags)
      for (int k = 0; k < l.size; ++k)
        l.delta[static_cast<std::size_t>(k)] =
            ti.phase_delta(l.q[static_cast<std::size_t>(k)], l.r[static_cast<std::size_t>(k)], phase);
  }

  // Scans the TI from the node's random start; returns true when a candidate was accepted.
  bool scan(Index c, std::uint32_t need, const ZoneData& zd, Worker& w, Index& src, float& dist) const {
    const TrainingImage& ti = *zd.ti;
    const Index limit = zd.limit;
    const float accept = zd.accept;
    const Index n = ti.size();
    const std::int64_t s = ti.stride(), K = ti.phase_length();
    const std::uint32_t* before = ti.real_before();
    w.view.need = need;
    float best = std::numeric_limits<float>::infinity();
    Index best_src = -1;
    const std::int64_t e0 = ti.slot(ti.padded_index(detail::scan_start(seed_of(), c, n)));
    std::int64_t phase = e0 / K, k = e0 % K;
    enter_phase(ti, w, phase);
    Index scanned = 0;
    float d[kLanes];
    Stats& st = w.stats;
    const bool wide = w.view.bytes;
    const bool screen = w.view.screen;
    float wd[kWideLanes + kLanes];
    std::fill(wd + kWideLanes, wd + kWideLanes + kLanes, std::numeric_limits<float>::infinity());
    std::int64_t wide_from = -1, wide_to = -1;
    bool wide_ok = false;
    while (scanned < n) {
      const std::int64_t e = phase * K + k;
      int lanes = static_cast<int>(std::min<std::int64_t>(kLanes, K - k));
      Index real = before[e + lanes] - before[e];
      const Index left = scanned < limit ? limit - scanned : n - scanned;
      if (real > left) {  // stop exactly at the limit
        lanes = 0;
        while (static_cast<Index>(before[e + lanes] - before[e]) < left) ++lanes;
        real = left;
      }
      st.candidates += real;
      bool ok = false;
      if (real > 0 && screen) {
        // Screening: one pass bounds kWideLanes slots from below; a block is evaluated exactly
        // only when one of its lanes may beat `best` (an abandoned block has no such lane, and
        // with best > accept_distance no lane of it would be accepted either).
        if (e < wide_from || e + lanes > wide_to) {
          const int span = static_cast<int>(std::min<std::int64_t>(kWideLanes, K - k));
          wide_ok = detail::screen_wide(w.view, e, span, best, wd, st.comparisons);
          wide_from = e;
          wide_to = e + span;
        }
        bool open = false;
        if (wide_ok)
          for (int j = 0; j < lanes; ++j) open |= !(wd[e - wide_from + j] > best);
        std::int64_t recounted = 0;  // the screen counted these comparisons already
        ok = open && detail::evaluate_block(w.view, e, lanes, best, d, recounted);
      } else if (real > 0 && wide) {
        // Byte kernel: one evaluation covers kWideLanes slots of this phase; the blocks inside it
        // read their distances from it (an abandoned one holds no candidate below its `best`,
        // which is at least the current one).
        if (e < wide_from || e + lanes > wide_to) {
          const int span = static_cast<int>(std::min<std::int64_t>(kWideLanes, K - k));
          wide_ok = detail::evaluate_wide(w.view, e, span, best, wd, st.comparisons);
          wide_from = e;
          wide_to = e + span;
        }
        ok = wide_ok;
        if (ok) std::memcpy(d, wd + (e - wide_from), sizeof d);
      } else if (real > 0) {
        ok = detail::evaluate_block(w.view, e, lanes, best, d, st.comparisons);
      }
      if (ok) {
        if (scanned >= limit) {
          // Past the limit with nothing usable seen: the first informed candidate is taken.
          for (int j = 0; j < lanes; ++j)
            if (d[j] < std::numeric_limits<float>::infinity()) {
              src = ti.real_index(e + j);
              dist = d[j];
              return d[j] <= accept;
            }
        }
        for (int j = 0; j < lanes; ++j) {
          if (d[j] <= accept) {
            src = ti.real_index(e + j);
            dist = d[j];
            return true;
          }
          if (d[j] < best) {
            best = d[j];
            best_src = ti.real_index(e + j);
          }
        }
      }
      scanned += real;
      k += lanes;
      if (k == K) {
        k = 0;
        if (++phase == s) phase = 0;
        enter_phase(ti, w, phase);
      }
      if (scanned >= limit && best_src >= 0) break;
    }
    src = best_src;
    dist = best;
    return false;
  }

  std::uint64_t seed_of() const noexcept { return zones_[0].params->seed; }

  const Grid& grid_;
  const std::vector<float*>& state_;
  const std::vector<bool>& auxiliary_;
  const std::int32_t* zone_;
  const Geometry& geometry_;
  std::int64_t* source_;
  int nvar_ = 0;
  int max_neighbors_ = 1;
  std::vector<ZoneData> zones_;
  const std::int64_t* order_ = nullptr;
  const std::uint32_t* need_of_ = nullptr;
  const std::atomic<std::uint8_t>* done_ = nullptr;
  const WorkControl* ctl_ = nullptr;
};

void check_params(const TrainingImage& ti, const Params& params, bool turned) {
  const int nvar = ti.variables();
  require(static_cast<int>(params.weights.size()) == nvar, "weights", "must hold one weight per variable.");
  for (int v = 0; v < nvar; ++v) {
    const double w = params.weights[static_cast<std::size_t>(v)];
    require(std::isfinite(w) && w > 0, "weights", "must hold finite positive numbers.");
  }
  require(params.neighbors >= 1 && params.neighbors <= 100000, "neighbors", "must be an integer in [1, 100000].");
  require(params.accept_distance >= 0 && params.accept_distance <= 1, "accept_distance", "must be a number in [0, 1].");
  require(params.scan_fraction > 0 && params.scan_fraction <= 1, "scan_fraction", "must be a number in (0, 1].");
  require(std::isfinite(params.lag_power) && params.lag_power >= 0, "lag_power", "must be a finite number >= 0.");
  if (turned) return;  // turned lags are checked against the padding as they are made
  for (const Offset& o : params.search)
    for (int a = 0; a < 3; ++a)
      require(std::abs(o[a]) <= ti.reach()[a], "search_radius",
              "reaches beyond the padding of the training image; build the image with the same radius.");
}

void check(const std::vector<const TrainingImage*>& tis, const std::vector<Params>& params, const std::int32_t* zone,
           const Geometry& geometry, const Grid& grid, const std::vector<float*>& state,
           const std::vector<bool>& auxiliary, const std::int64_t* source) {
  require(!tis.empty() && tis.size() == params.size(), "zones", "must give one training image and parameter set per zone.");
  for (const TrainingImage* t : tis) require(t != nullptr, "zones", "must give a training image for every zone.");
  const TrainingImage& ti = *tis[0];
  const int nvar = ti.variables();
  for (const TrainingImage* t : tis) {
    require(t->variables() == nvar, "zones", "must give training images holding the same variables.");
    for (int v = 0; v < nvar; ++v)
      require(t->kind(v) == ti.kind(v), "zones", "must give training images whose variables have the same kinds.");
  }
  require(static_cast<int>(state.size()) == nvar, "hard", "must give one grid array per training-image variable.");
  require(static_cast<int>(auxiliary.size()) == nvar, "auxiliary", "must flag every training-image variable.");
  require(source != nullptr, "source", "must be given.");
  for (int v = 0; v < nvar; ++v)
    require(state[static_cast<std::size_t>(v)] != nullptr, "hard", "is missing the grid array of a variable.");
  const bool turned = geometry.cls != nullptr;
  for (std::size_t z = 0; z < tis.size(); ++z) check_params(*tis[z], params[z], turned);
  const Index cells = grid.size();
  if (zone)
    for (Index i = 0; i < cells; ++i)
      require(zone[i] >= 0 && static_cast<std::size_t>(zone[i]) < tis.size(), "zones",
              "must hold zone indices that each have a training image; cell " + str(i) + " has " + str(zone[i]) + ".");
  if (turned) {
    const std::size_t classes = geometry.matrices.size() / 9;
    require(geometry.matrices.size() % 9 == 0 && classes > 0, "rotation", "must give one 3x3 matrix per class.");
    for (double x : geometry.matrices) require(std::isfinite(x), "rotation", "must give finite matrices.");
    for (Index i = 0; i < cells; ++i)
      require(geometry.cls[i] >= 0 && static_cast<std::size_t>(geometry.cls[i]) < classes, "rotation",
              "must give a class of a known matrix for every cell; cell " + str(i) + " has " + str(geometry.cls[i]) + ".");
  }
  bool simulated = false;
  for (int v = 0; v < nvar; ++v) simulated |= !auxiliary[static_cast<std::size_t>(v)];
  require(simulated, "auxiliary", "must leave at least one variable to simulate.");
  for (int v = 0; v < nvar; ++v) {
    if (!auxiliary[static_cast<std::size_t>(v)]) continue;
    const float* s = state[static_cast<std::size_t>(v)];
    for (Index i = 0; i < cells; ++i)
      require(!std::isnan(s[i]), "auxiliary", "must be informed at every grid node; variable " + str(v) +
                                                  " is unknown at cell " + str(i) + ".");
  }
}

}  // namespace

Stats simulate(const TrainingImage& ti, const Grid& grid, const std::vector<float*>& state,
               const std::vector<bool>& auxiliary, const Params& params, std::int64_t* source, WorkControl& ctl,
               const Poll& poll) {
  return simulate_zones({&ti}, {params}, nullptr, Geometry{}, grid, state, auxiliary, source, ctl, poll);
}

Stats simulate_zones(const std::vector<const TrainingImage*>& tis, const std::vector<Params>& params,
                     const std::int32_t* zone, const Geometry& geometry, const Grid& grid,
                     const std::vector<float*>& state, const std::vector<bool>& auxiliary, std::int64_t* source,
                     WorkControl& ctl, const Poll& poll) {
  check(tis, params, zone, geometry, grid, state, auxiliary, source);
  const Params& global = params[0];
  const auto t0 = std::chrono::steady_clock::now();
  Simulation sim(tis, params, zone, geometry, grid, state, auxiliary, source);
  const Index cells = grid.size();
  std::fill(source, source + cells, std::int64_t{-1});

  const int nvar = tis[0]->variables();
  std::uint32_t all = 0;
  for (int v = 0; v < nvar; ++v)
    if (!auxiliary[static_cast<std::size_t>(v)]) all |= std::uint32_t{1} << v;
  std::vector<Index> path;
  std::vector<std::uint32_t> need_of(static_cast<std::size_t>(cells), 0);
  std::vector<std::uint8_t> any_full(tis.size(), 0), any_node(tis.size(), 0);
  for (Index c = 0; c < cells; ++c) {
    const std::uint32_t need = sim.need_at(c);
    need_of[static_cast<std::size_t>(c)] = need;
    const std::size_t z = zone ? static_cast<std::size_t>(zone[c]) : 0;
    if (need) {
      path.push_back(c);
      any_node[z] = 1;
    }
    if (need == all) any_full[z] = 1;
  }
  for (std::size_t z = 0; z < tis.size(); ++z) {
    if (!any_node[z]) continue;
    // A node missing every variable needs a TI cell informed in all of them; others need a subset.
    const Index usable = tis[z]->count_informed(any_full[z] ? all : 0);
    require(usable > 0, "training_image",
            "has no cell where every simulated variable is informed; at least one is needed to copy from" +
                (tis.size() > 1 ? " (zone " + str(static_cast<std::int64_t>(z)) + ")." : std::string(".")));
  }
  ctl.total = static_cast<std::int64_t>(path.size());

  // Path order. Random: shuffled. Several workers take it reordered into conflict-free batches
  // (nodes of one batch cannot see each other, and each comes after the earlier nodes it sees), which
  // spreads consecutive nodes apart so that workers rarely wait on each other and leaves the result
  // that of the shuffled path. Sweep: flat order, a unilateral scheme in which every node depends on
  // the previous one, so it runs on one thread. The reach is the widest search window of any zone
  // (on the grid).
  int threads = resolve_threads(global.threads);
  if (global.path != PathKind::random) threads = 1;
  threads = static_cast<int>(std::clamp<std::int64_t>(static_cast<std::int64_t>(path.size()), 1, threads));
  if (global.path == PathKind::random) {
    shuffle_path(path, global.seed, 0);
    Offset reach{0, 0, 0};
    for (const Params& p : params)
      for (const Offset& o : p.search)
        for (int a = 0; a < 3; ++a) reach[a] = std::max(reach[a], std::abs(o[a]));
    if (threads > 1) conflict_free_batches(grid, 0, reach, path);  // the order only: workers wait per node
  }
  // The result is that of one thread visiting the path in order: a node waits only for the earlier
  // nodes it reads (no barrier between batches, so a worker the system pauses holds up only the nodes
  // that need its node), which makes it the same for any number of threads.
  std::vector<std::int64_t> order(static_cast<std::size_t>(cells), -1);
  for (std::size_t i = 0; i < path.size(); ++i) order[static_cast<std::size_t>(path[i])] = static_cast<std::int64_t>(i);
  std::vector<std::atomic<std::uint8_t>> done(static_cast<std::size_t>(cells));
  sim.set_schedule(order.data(), need_of.data(), done.data(), &ctl);
  std::vector<Worker> workers;
  for (int i = 0; i < threads; ++i) workers.push_back(sim.make_worker());
  std::atomic<std::int64_t> next{0};
  const auto count = static_cast<std::int64_t>(path.size());
  const double setup = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  run_supervised(
      threads,
      [&](int worker, int) {
        Worker& w = workers[static_cast<std::size_t>(worker)];
        // The worker's CPU time, read once at each end (a thread-clock read is a system call;
        // per node it cost ~2 % of a run with short scans).
        struct CpuClock {
          double& total;
          double start = thread_cpu_seconds();
          ~CpuClock() { total += thread_cpu_seconds() - start; }
        } clock{w.stats.cpu_seconds};
        while (!ctl.cancelled()) {
          const std::int64_t pos = next.fetch_add(1, std::memory_order_relaxed);
          if (pos >= count) return;
          const Index c = path[static_cast<std::size_t>(pos)];
          if (!sim.node(c, pos, w)) return;
          done[static_cast<std::size_t>(c)].store(1, std::memory_order_release);
          ctl.done.fetch_add(1, std::memory_order_relaxed);
        }
      },
      ctl, poll);
  Stats total;
  for (const Worker& w : workers) {
    total.nodes += w.stats.nodes;
    total.candidates += w.stats.candidates;
    total.comparisons += w.stats.comparisons;
    total.accepted += w.stats.accepted;
    total.exact += w.stats.exact;
    total.waits += w.stats.waits;
    total.wait_seconds += w.stats.wait_seconds;
    total.distance_sum += w.stats.distance_sum;
    total.cpu_seconds += w.stats.cpu_seconds;
  }
  total.threads = threads;
  total.setup_seconds = setup;
  total.seconds = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
  return total;
}

}  // namespace sl::direct
