#include "tree/bit_planes.hpp"

#include <algorithm>
#include <bit>
#include <cstdlib>
#include <string_view>
#include <utility>

#if defined(__x86_64__) && (defined(__GNUC__) || defined(__clang__)) && !defined(STRATALOOM_NO_CLONES)
#define SL_HAVE_AVX512_PLANES 1
#include <immintrin.h>
#endif

namespace sl::planes {

namespace {

// After a group of planes, all kept (the set spans [lo, hi), `nonzero` of its words non-zero):
// whether the set has become sparse (few non-empty words over a wide span), where the caller
// goes on with a list of its words.
inline bool is_sparse(Narrowed& out, std::size_t lo, std::size_t hi, std::size_t nonzero, std::size_t sparse_ratio) {
  out.sparse = hi - lo > 16 && nonzero * sparse_ratio < hi - lo;
  return out.sparse;
}

// The result of a narrowing: the set kept and its span, written back to the caller's bounds.
inline Narrowed finish(Narrowed out, const std::uint64_t* cur, std::size_t lo, std::size_t hi, std::size_t& lo_ref,
                       std::size_t& hi_ref) {
  out.set = cur;
  lo_ref = lo;
  hi_ref = hi;
  return out;
}

// The code of the centre at bit `bit` of word `w` (every centre holds one).
inline int category_of(const CategoryPlanes& c, std::size_t w, unsigned bit) {
  const std::uint64_t mask = std::uint64_t{1} << bit;
  for (std::size_t q = 0; q + 1 < c.count; ++q)
    if (c.planes[q * c.words + w] & mask) return static_cast<int>(q);
  return static_cast<int>(c.count) - 1;
}

// The code of the first centre of a set whose first non-zero word is `w`.
inline int first_category(const CategoryPlanes& c, const std::uint64_t* set, std::size_t w) {
  return category_of(c, w, static_cast<unsigned>(std::countr_zero(set[w])));
}

// Plain loops: with clones for processors with popcount and with AVX2, which the compiler
// vectorises the AND and the zero test for.
#if defined(__x86_64__) && defined(__ELF__) && (defined(__GNUC__) || defined(__clang__)) && !defined(STRATALOOM_NO_CLONES)
#define SL_PORTABLE_KERNEL __attribute__((target_clones("default", "popcnt", "arch=x86-64-v3")))
#else
#define SL_PORTABLE_KERNEL
#endif

// Bits set in a[i] & b[i] over i < n. Inline, so that each clone of the narrowing loop gets its
// own copy (a call to the cloned count_and_portable from there made it 6 % slower).
inline std::int64_t popcount_and(const std::uint64_t* a, const std::uint64_t* b, std::size_t n) {
  std::int64_t t = 0;
  for (std::size_t i = 0; i < n; ++i) t += std::popcount(a[i] & b[i]);
  return t;
}

SL_PORTABLE_KERNEL std::int64_t count_and_portable(const std::uint64_t* a, const std::uint64_t* b, std::size_t n) {
  return popcount_and(a, b, n);
}

SL_PORTABLE_KERNEL Narrowed narrow_portable(const std::uint64_t* start, std::uint64_t* a_buf, std::uint64_t* b_buf,
                                            const EventPlanes& plane, std::size_t m, std::size_t& lo_ref,
                                            std::size_t& hi_ref, std::int64_t min_replicates, std::size_t sparse_ratio,
                                            const CategoryPlanes* pure) {
  // Local copies: stores through the word pointers could otherwise alias these (and the compiler
  // would not vectorise the loops).
  std::size_t lo = lo_ref, hi = hi_ref;
  const std::int64_t need = std::max<std::int64_t>(min_replicates, 1);
  Narrowed out;
  const std::uint64_t* cur = start;
  std::uint64_t* dst = a_buf;  // never `cur`
  std::uint64_t* other = b_buf;
  for (std::size_t j = 0; j < m;) {
    const std::size_t group_end = std::min(m, j + kGroupPlanes);
    const std::uint64_t* c = nullptr;  // the plane of the code of the group's first centre
    int q = -1;
    if (pure) {
      q = first_category(*pure, cur, lo);
      c = pure->planes + static_cast<std::size_t>(q) * pure->words;
      std::uint64_t other_codes = 0;
      for (std::size_t i = lo; i < hi; ++i) other_codes |= cur[i] & ~c[i];
      if (other_codes == 0) {
        out.category = q;
        out.count = popcount_and(cur + lo, cur + lo, hi - lo);
        return out;
      }
    }
    std::size_t nonzero = 0;
    for (; j < group_end; ++j) {
      const std::uint64_t* p = plane[j];
      out.words += hi - lo;
      nonzero = 0;
      std::uint64_t other_codes = 0;
      // Popcounts only where a count is needed (min_replicates > 1, or the stop on one code):
      // without a vector popcount they cost more than the AND.
      for (std::size_t i = lo; i < hi; ++i) {
        const std::uint64_t a = cur[i] & p[i];
        dst[i] = a;
        nonzero += a != 0;
        if (c) other_codes |= a & ~c[i];
      }
      if (nonzero == 0) return finish(out, cur, lo, hi, lo_ref, hi_ref);
      const bool one_code = c && other_codes == 0;
      const std::int64_t left = need > 1 || one_code ? popcount_and(dst + lo, dst + lo, hi - lo) : 1;
      if (left < need) return finish(out, cur, lo, hi, lo_ref, hi_ref);
      if (one_code) {
        out.kept = j + 1;
        out.category = q;
        out.count = left;
        return out;
      }
      std::size_t first = lo, last = hi - 1;
      while (dst[first] == 0) ++first;
      while (dst[last] == 0) --last;
      cur = dst;
      std::swap(dst, other);
      lo = first;
      hi = last + 1;
      out.kept = j + 1;
    }
    if (is_sparse(out, lo, hi, nonzero, sparse_ratio)) break;
  }
  return finish(out, cur, lo, hi, lo_ref, hi_ref);
}

#ifdef SL_HAVE_AVX512_PLANES
#define SL_AVX512_KERNEL __attribute__((target("avx512f,avx512vpopcntdq,popcnt,bmi,lzcnt")))

SL_AVX512_KERNEL inline __mmask8 lanes_left(std::size_t left) {
  return left >= 8 ? static_cast<__mmask8>(0xFF) : static_cast<__mmask8>((1u << left) - 1);
}

SL_AVX512_KERNEL inline std::int64_t sum_lanes(__m512i v) {
  alignas(64) std::int64_t lane[8];
  _mm512_store_si512(lane, v);
  return lane[0] + lane[1] + lane[2] + lane[3] + lane[4] + lane[5] + lane[6] + lane[7];
}

SL_AVX512_KERNEL inline bool all_zero(__m512i v) { return _mm512_test_epi64_mask(v, v) == 0; }

// (acc | (s & ~c)) per bit: acc collects the centres of s outside the code plane c.
SL_AVX512_KERNEL inline __m512i add_outside(__m512i acc, __m512i s, __m512i c) {
  return _mm512_ternarylogic_epi64(acc, s, c, 0xF4);
}

// Which of the (up to) eight words from `at` (below `end`) are non-zero, as bits.
SL_AVX512_KERNEL inline unsigned words_set(const std::uint64_t* words, std::size_t at, std::size_t end) {
  const __m512i a = _mm512_loadu_si512(words + at);
  return static_cast<unsigned>(_mm512_mask_test_epi64_mask(lanes_left(end - at), a, a));
}

// Narrows [lo, hi) to the non-zero words of a set written over whole vectors from lo (zero past
// hi); the set holds a centre.
SL_AVX512_KERNEL inline void trim(const std::uint64_t* set, std::size_t& lo, std::size_t& hi) {
  std::size_t i = lo;
  unsigned bits = words_set(set, i, hi);
  while (bits == 0) bits = words_set(set, i += 8, hi);
  const std::size_t first = i + static_cast<std::size_t>(std::countr_zero(bits));
  i = lo + (hi - 1 - lo) / 8 * 8;
  bits = words_set(set, i, hi);
  while (bits == 0) bits = words_set(set, i -= 8, hi);
  hi = i + 32 - static_cast<std::size_t>(std::countl_zero(bits));
  lo = first;
}

// The set `cur`[lo, hi) ANDed with the first g planes of `pp`, written to `dst` (whole vectors).
SL_AVX512_KERNEL inline void and_planes(const std::uint64_t* cur, const std::uint64_t* const* pp, std::size_t g,
                                        std::uint64_t* dst, std::size_t lo, std::size_t hi) {
  for (std::size_t i = lo; i < hi; i += 8) {
    __m512i x = _mm512_maskz_mov_epi64(lanes_left(hi - i), _mm512_loadu_si512(cur + i));
    for (std::size_t t = 0; t < g; ++t) x = _mm512_and_si512(x, _mm512_loadu_si512(pp[t] + i));
    _mm512_storeu_si512(dst + i, x);
  }
}

SL_AVX512_KERNEL std::int64_t count_and_avx512(const std::uint64_t* a, const std::uint64_t* b, std::size_t n) {
  __m512i acc = _mm512_setzero_si512();
  for (std::size_t i = 0; i < n; i += 8) {
    acc = _mm512_add_epi64(acc, _mm512_popcnt_epi64(_mm512_maskz_and_epi64(lanes_left(n - i), _mm512_loadu_si512(a + i),
                                                                            _mm512_loadu_si512(b + i))));
  }
  return sum_lanes(acc);
}

// The register path of narrow_avx512_with: a set of at most two vectors (hi - lo <= 16) stays in
// registers for the remaining planes (no stores and no trimming between planes).
template <bool kPure>
SL_AVX512_KERNEL Narrowed narrow_in_registers(Narrowed out, const std::uint64_t* cur, std::uint64_t* dst,
                                              const EventPlanes& plane, std::size_t j, std::size_t m,
                                              std::size_t lo, std::size_t hi, std::size_t& lo_ref,
                                              std::size_t& hi_ref, std::int64_t need, const CategoryPlanes* pure) {
  const __mmask8 lanes0 = lanes_left(hi - lo), lanes1 = hi - lo > 8 ? lanes_left(hi - lo - 8) : 0;
  __m512i a0 = _mm512_maskz_mov_epi64(lanes0, _mm512_loadu_si512(cur + lo));
  __m512i a1 = _mm512_maskz_mov_epi64(lanes1, _mm512_loadu_si512(cur + lo + 8));
  const std::size_t kept_before = out.kept;
  while (j < m) {
    const std::size_t group_end = std::min(m, j + kGroupPlanes);
    __m512i c0 = _mm512_setzero_si512(), c1 = c0;
    int q = -1;
    if constexpr (kPure) {
      const unsigned set = _mm512_test_epi64_mask(a0, a0) | static_cast<unsigned>(_mm512_test_epi64_mask(a1, a1)) << 8;
      const unsigned w = static_cast<unsigned>(std::countr_zero(set));  // the set is never empty here
      alignas(64) std::uint64_t lanes[16];
      _mm512_store_si512(lanes, a0);
      _mm512_store_si512(lanes + 8, a1);
      q = category_of(*pure, lo + w, static_cast<unsigned>(std::countr_zero(lanes[w])));
      const std::uint64_t* c = pure->planes + static_cast<std::size_t>(q) * pure->words + lo;
      c0 = _mm512_loadu_si512(c);
      c1 = _mm512_loadu_si512(c + 8);
      if (all_zero(_mm512_or_si512(_mm512_maskz_andnot_epi64(0xFF, c0, a0), _mm512_maskz_andnot_epi64(0xFF, c1, a1)))) {
        out.category = q;
        out.count = sum_lanes(_mm512_add_epi64(_mm512_popcnt_epi64(a0), _mm512_popcnt_epi64(a1)));
        return out;
      }
    }
    bool dropped = false;
    for (; j < group_end; ++j) {
      out.words += hi - lo;
      const __m512i b0 = _mm512_and_si512(a0, _mm512_loadu_si512(plane[j] + lo));
      const __m512i b1 = _mm512_and_si512(a1, _mm512_loadu_si512(plane[j] + lo + 8));
      if (need > 1) {
        if (sum_lanes(_mm512_add_epi64(_mm512_popcnt_epi64(b0), _mm512_popcnt_epi64(b1))) < need) dropped = true;
      } else if (all_zero(_mm512_or_si512(b0, b1))) {
        dropped = true;
      }
      if (dropped) break;
      out.kept = j + 1;
      if constexpr (kPure) {
        if (all_zero(_mm512_or_si512(_mm512_maskz_andnot_epi64(0xFF, c0, b0), _mm512_maskz_andnot_epi64(0xFF, c1, b1)))) {
          out.category = q;
          out.count = sum_lanes(_mm512_add_epi64(_mm512_popcnt_epi64(b0), _mm512_popcnt_epi64(b1)));
          return out;
        }
      }
      a0 = b0;
      a1 = b1;
    }
    if (dropped) break;
  }
  if (out.kept == kept_before) return finish(out, cur, lo, hi, lo_ref, hi_ref);  // nothing added: in place
  _mm512_storeu_si512(dst + lo, a0);
  _mm512_storeu_si512(dst + lo + 8, a1);
  const unsigned set = _mm512_test_epi64_mask(a0, a0) | static_cast<unsigned>(_mm512_test_epi64_mask(a1, a1)) << 8;
  const std::size_t first = lo + static_cast<std::size_t>(std::countr_zero(set));  // set != 0: a plane was kept
  const std::size_t end = lo + 16 - static_cast<std::size_t>(std::countl_zero(set << 16));
  return finish(out, dst, first, end, lo_ref, hi_ref);
}

template <bool kPure>
SL_AVX512_KERNEL Narrowed narrow_avx512_with(const std::uint64_t* start, std::uint64_t* a_buf, std::uint64_t* b_buf,
                                             const EventPlanes& plane, std::size_t m, std::size_t& lo_ref,
                                             std::size_t& hi_ref, std::int64_t min_replicates, std::size_t sparse_ratio,
                                             const CategoryPlanes* pure) {
  // Local copies: stores through the word pointers could otherwise alias these.
  const std::uint64_t* cur = start;
  std::uint64_t* dst = a_buf;  // where the next group writes: never `cur`
  std::uint64_t* other = b_buf;
  std::size_t lo = lo_ref, hi = hi_ref;
  const std::int64_t need = std::max<std::int64_t>(min_replicates, 1);
  Narrowed out;
  for (std::size_t j = 0; j < m;) {
    if (hi - lo <= 16) return narrow_in_registers<kPure>(out, cur, dst, plane, j, m, lo, hi, lo_ref, hi_ref, need, pure);
    // One sweep ANDs the whole group: per plane g of it, the centres left (pop[g]) and, with
    // `pure`, those outside the code q of the group's first centre (outside[g]; outside_start for
    // the set the group starts from). No data-dependent branch inside the sweep: which words
    // survive varies from call to call. A group past the last plane repeats the last one.
    const std::size_t G = std::min(m - j, kGroupPlanes);
    const std::uint64_t* pp[kGroupPlanes];
    for (std::size_t g = 0; g < kGroupPlanes; ++g) pp[g] = plane[j + std::min(g, G - 1)];
    const int q = kPure ? first_category(*pure, cur, lo) : 0;
    const std::uint64_t* c = kPure ? pure->planes + static_cast<std::size_t>(q) * pure->words : cur;
    __m512i pop[kGroupPlanes], outside[kGroupPlanes];
    for (std::size_t g = 0; g < kGroupPlanes; ++g) pop[g] = outside[g] = _mm512_setzero_si512();
    __m512i outside_start = _mm512_setzero_si512(), nonzero_words = outside_start;
    const __m512i one = _mm512_set1_epi64(1);
    for (std::size_t i = lo; i < hi; i += 8) {
      // Whole vectors (the arrays have room past hi, zero there): masked stores would stall the
      // loads of the next group, which reads them back.
      __m512i x = _mm512_maskz_mov_epi64(lanes_left(hi - i), _mm512_loadu_si512(cur + i));
      __m512i ci = _mm512_setzero_si512();
      if constexpr (kPure) {
        ci = _mm512_loadu_si512(c + i);
        outside_start = add_outside(outside_start, x, ci);
      }
      for (std::size_t g = 0; g < kGroupPlanes; ++g) {
        x = _mm512_and_si512(x, _mm512_loadu_si512(pp[g] + i));
        pop[g] = _mm512_add_epi64(pop[g], _mm512_popcnt_epi64(x));
        if constexpr (kPure) outside[g] = add_outside(outside[g], x, ci);
      }
      _mm512_storeu_si512(dst + i, x);
      nonzero_words = _mm512_mask_add_epi64(nonzero_words, _mm512_test_epi64_mask(x, x), nonzero_words, one);
    }
    if (kPure && all_zero(outside_start)) {
      out.category = q;
      out.count = count_and_avx512(cur + lo, cur + lo, hi - lo);
      return out;
    }
    for (std::size_t g = 0; g < G; ++g) {
      out.words += hi - lo;
      const std::int64_t left = sum_lanes(pop[g]);
      if (left < need) {
        if (g == 0) return finish(out, cur, lo, hi, lo_ref, hi_ref);
        and_planes(cur, pp, g, dst, lo, hi);
        trim(dst, lo, hi);
        return finish(out, dst, lo, hi, lo_ref, hi_ref);
      }
      out.kept = j + g + 1;
      if (kPure && all_zero(outside[g])) {
        out.category = q;
        out.count = left;
        return out;
      }
    }
    trim(dst, lo, hi);
    cur = dst;
    std::swap(dst, other);
    j += G;
    if (is_sparse(out, lo, hi, static_cast<std::size_t>(sum_lanes(nonzero_words)), sparse_ratio)) break;
  }
  return finish(out, cur, lo, hi, lo_ref, hi_ref);
}

SL_AVX512_KERNEL Narrowed narrow_avx512(const std::uint64_t* start, std::uint64_t* a_buf, std::uint64_t* b_buf,
                                        const EventPlanes& plane, std::size_t m, std::size_t& lo,
                                        std::size_t& hi, std::int64_t min_replicates, std::size_t sparse_ratio,
                                        const CategoryPlanes* pure) {
  return pure ? narrow_avx512_with<true>(start, a_buf, b_buf, plane, m, lo, hi, min_replicates, sparse_ratio, pure)
              : narrow_avx512_with<false>(start, a_buf, b_buf, plane, m, lo, hi, min_replicates, sparse_ratio, pure);
}

bool has_avx512_popcount() {
  __builtin_cpu_init();
  return __builtin_cpu_supports("avx512f") && __builtin_cpu_supports("avx512vpopcntdq");
}
#endif

const Kernels kPortable{"portable", narrow_portable, count_and_portable};
#ifdef SL_HAVE_AVX512_PLANES
const Kernels kAvx512{"avx512", narrow_avx512, count_and_avx512};
#endif

}  // namespace

SL_PORTABLE_KERNEL std::size_t keep_matching(const std::uint32_t* word_index, const std::uint64_t* word_alive,
                                             std::size_t n, const std::uint64_t* plane, std::uint32_t* out_index,
                                             std::uint64_t* out_alive, std::int64_t& total) {
  std::size_t out = 0;
  std::int64_t t = 0;
  for (std::size_t i = 0; i < n; ++i) {
    const std::uint32_t w = word_index[i];
    const std::uint64_t a = word_alive[i] & plane[w];
    out_index[out] = w;
    out_alive[out] = a;
    out += a != 0;
    t += std::popcount(a);
  }
  total += t;
  return out;
}

SL_PORTABLE_KERNEL void count_categories(const std::uint32_t* word_index, const std::uint64_t* word_alive,
                                         std::size_t n, const std::uint64_t* category, std::size_t words,
                                         std::size_t K, std::int64_t* counts) {
  for (std::size_t q = 0; q < K; ++q) {
    const std::uint64_t* c = category + q * words;
    std::int64_t t = 0;
    for (std::size_t i = 0; i < n; ++i) t += std::popcount(word_alive[i] & c[word_index[i]]);
    counts[q] = t;
  }
}

bool portable_kernels_asked() {
  const char* asked = std::getenv("STRATALOOM_KERNELS");
  return asked != nullptr && std::string_view(asked) == "portable";
}

const Kernels& portable() { return kPortable; }

const Kernels& best() {
  static const Kernels& chosen = [] () -> const Kernels& {
    if (portable_kernels_asked()) return kPortable;
#ifdef SL_HAVE_AVX512_PLANES
    if (has_avx512_popcount()) return kAvx512;
#endif
    return kPortable;
  }();
  return chosen;
}

}  // namespace sl::planes
