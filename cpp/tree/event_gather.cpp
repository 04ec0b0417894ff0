#include "tree/event_gather.hpp"

#include "tree/bit_planes.hpp"

#include <algorithm>
#include <bit>
#include <limits>

#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__)) && !defined(STRATALOOM_NO_CLONES)
#define SL_HAVE_AVX512_GATHER 1
#include <immintrin.h>
#endif

namespace sl {

namespace {

bool vector_gathers_available() {
#ifdef SL_HAVE_AVX512_GATHER
  if (planes::portable_kernels_asked()) return false;
  __builtin_cpu_init();
  return __builtin_cpu_supports("avx512f");
#else
  return false;
#endif
}

bool fits_32_bits(Index v) {
  return v > std::numeric_limits<std::int32_t>::min() && v <= std::numeric_limits<std::int32_t>::max();
}

}  // namespace

EventGather::EventGather(const Grid& grid, const std::vector<Offset>& offsets, Index step) : grid_(grid) {
  bool fits = true;  // the vector version works in 32-bit lanes
  for (const Offset& o : offsets) {
    const Ijk scaled{Index{o[0]} * step, Index{o[1]} * step, Index{o[2]} * step};
    offsets_.push_back(scaled);
    flat_.push_back((scaled[0] * grid.shape()[1] + scaled[1]) * grid.shape()[2] + scaled[2]);
    for (int a = 0; a < 3; ++a) {
      reach_[a] = std::max(reach_[a], scaled[a] < 0 ? -scaled[a] : scaled[a]);
      fits = fits && fits_32_bits(scaled[a]);
    }
    fits = fits && fits_32_bits(flat_.back());
  }
  for (int a = 0; a < 3; ++a) fits = fits && grid.shape()[a] < (Index{1} << 30);
  vector_ = fits && vector_gathers_available();
  if (vector_) {
    const std::size_t lanes = (offsets_.size() + 15) / 16 * 16;
    flat32_.assign(lanes, 0);
    dz_.assign(lanes, 0);
    dy_.assign(lanes, 0);
    dx_.assign(lanes, 0);
    for (std::size_t i = 0; i < offsets_.size(); ++i) {
      flat32_[i] = static_cast<std::int32_t>(flat_[i]);
      dz_[i] = static_cast<std::int32_t>(offsets_[i][0]);
      dy_[i] = static_cast<std::int32_t>(offsets_[i][1]);
      dx_[i] = static_cast<std::int32_t>(offsets_[i][2]);
    }
  }
}

int EventGather::gather(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
                        std::uint8_t* value) const {
  return vector_ ? gather_vector(sim, cell, c, cap, index, value) : gather_plain(sim, cell, c, cap, index, value);
}

int EventGather::gather_plain(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
                              std::uint8_t* value) const {
  int m = 0;
  if (away_from_faces(c)) {
    // Away from the grid's faces every node is inside: flat offsets, no tests.
    const std::int16_t* here = sim + cell;
    for (std::size_t i = 0; i < flat_.size() && m < cap; ++i) {
      const std::int16_t v = here[flat_[i]];
      index[m] = static_cast<std::int32_t>(i);
      value[m] = static_cast<std::uint8_t>(v);
      m += v >= 0;
    }
    return m;
  }
  for (std::size_t i = 0; i < offsets_.size() && m < cap; ++i) {
    const Ijk& o = offsets_[i];
    const Ijk q{c[0] + o[0], c[1] + o[1], c[2] + o[2]};
    if (!grid_.contains(q)) continue;
    const std::int16_t v = sim[grid_.index(q)];
    if (v < 0) continue;
    index[m] = static_cast<std::int32_t>(i);
    value[m] = static_cast<std::uint8_t>(v);
    ++m;
  }
  return m;
}

#ifdef SL_HAVE_AVX512_GATHER
__attribute__((target("avx512f"))) int EventGather::gather_vector(const std::int16_t* sim, Index cell, const Ijk& c,
                                                                  int cap, std::int32_t* index,
                                                                  std::uint8_t* value) const {
  if (cap <= 0) return 0;
  // Sixteen template nodes at a time: which lie inside the grid (unsigned compares per axis), a
  // gather of their codes, and the informed ones packed in order.
  const __m512i cz = _mm512_set1_epi32(static_cast<std::int32_t>(c[0]));
  const __m512i cy = _mm512_set1_epi32(static_cast<std::int32_t>(c[1]));
  const __m512i cx = _mm512_set1_epi32(static_cast<std::int32_t>(c[2]));
  const Ijk& n = grid_.shape();
  const __m512i nz = _mm512_set1_epi32(static_cast<std::int32_t>(n[0]));
  const __m512i ny = _mm512_set1_epi32(static_cast<std::int32_t>(n[1]));
  const __m512i nx = _mm512_set1_epi32(static_cast<std::int32_t>(n[2]));
  const __m512i iota = _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15);
  const __m512i zero = _mm512_setzero_si512();
  const __m512i sign = _mm512_set1_epi32(0x8000);
  const void* here = sim + cell;
  const std::size_t D = offsets_.size();
  // Away from the grid's faces every template node is inside: no bounds to test.
  const bool interior = away_from_faces(c);
  int m = 0;
  for (std::size_t i = 0; i < D && m < cap; i += 16) {
    const __mmask16 lanes = D - i >= 16 ? static_cast<__mmask16>(0xFFFF) : static_cast<__mmask16>((1u << (D - i)) - 1);
    __mmask16 inside = lanes;
    if (!interior) {
      const __m512i z = _mm512_add_epi32(cz, _mm512_loadu_si512(dz_.data() + i));
      const __m512i y = _mm512_add_epi32(cy, _mm512_loadu_si512(dy_.data() + i));
      const __m512i x = _mm512_add_epi32(cx, _mm512_loadu_si512(dx_.data() + i));
      inside = _mm512_mask_cmplt_epu32_mask(inside, z, nz);
      inside = _mm512_mask_cmplt_epu32_mask(inside, y, ny);
      inside = _mm512_mask_cmplt_epu32_mask(inside, x, nx);
    }
    // 4 bytes from each node's code (the low half; the grid has one spare entry at its end).
    const __m512i raw = _mm512_mask_i32gather_epi32(zero, inside, _mm512_loadu_si512(flat32_.data() + i), here, 2);
    // Informed: the code's sign bit (bit 15) clear; codes are below 255, so their low byte is the code.
    const __mmask16 informed = _mm512_mask_testn_epi32_mask(inside, raw, sign);
    const __m512i at = _mm512_add_epi32(iota, _mm512_set1_epi32(static_cast<std::int32_t>(i)));
    _mm512_storeu_si512(index + m, _mm512_maskz_compress_epi32(informed, at));
    _mm_storeu_si128(reinterpret_cast<__m128i*>(value + m),
                     _mm512_maskz_cvtepi32_epi8(0xFFFF, _mm512_maskz_compress_epi32(informed, raw)));
    m += std::popcount(static_cast<unsigned>(informed));
  }
  return m < cap ? m : cap;
}
#else
int EventGather::gather_vector(const std::int16_t* sim, Index cell, const Ijk& c, int cap, std::int32_t* index,
                               std::uint8_t* value) const {
  return gather_plain(sim, cell, c, cap, index, value);
}
#endif

}  // namespace sl
