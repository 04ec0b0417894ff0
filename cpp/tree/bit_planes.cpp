#include "tree/bit_planes.hpp"

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

// After a pass that wrote the set after plane j to `dst` (non-zero words first..last, `nonzero` of
// them): makes it the current set and narrows [lo, hi) to it. True when the set has become sparse
// (few non-empty words over a wide span): the caller stops there.
inline bool keep_pass(Narrowed& out, const std::uint64_t*& cur, std::uint64_t*& dst, std::uint64_t*& other,
                      std::size_t& lo, std::size_t& hi, std::size_t j, std::size_t first, std::size_t last,
                      std::size_t nonzero, std::size_t sparse_ratio) {
  cur = dst;
  std::swap(dst, other);
  lo = first;
  hi = last + 1;
  out.kept = j + 1;
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

SL_PORTABLE_KERNEL Narrowed narrow_portable(const std::uint64_t* start, std::uint64_t* a_buf, std::uint64_t* b_buf,
                                            const EventPlanes& plane, std::size_t m, std::size_t& lo_ref,
                                            std::size_t& hi_ref, std::int64_t min_replicates, std::size_t sparse_ratio,
                                            const CategoryPlanes* pure) {
  // Local copies: stores through the word pointers could otherwise alias these (and the compiler
  // would not vectorise the loops).
  std::size_t lo = lo_ref, hi = hi_ref;
  Narrowed out;
  const std::uint64_t* cur = start;
  std::uint64_t* dst = a_buf;  // never `cur`
  std::uint64_t* other = b_buf;
  for (std::size_t j = 0; j < m; ++j) {
    if (pure) {
      const int q = first_category(*pure, cur, lo);
      const std::uint64_t* c = pure->planes + static_cast<std::size_t>(q) * pure->words;
      std::uint64_t other_codes = 0;
      for (std::size_t i = lo; i < hi; ++i) other_codes |= cur[i] & ~c[i];
      if (other_codes == 0) {
        out.category = q;
        break;
      }
    }
    const std::uint64_t* p = plane[j];
    out.words += hi - lo;
    std::size_t nonzero = 0;
    for (std::size_t i = lo; i < hi; ++i) {
      const std::uint64_t a = cur[i] & p[i];
      dst[i] = a;
      nonzero += a != 0;
    }
    if (nonzero == 0) break;
    std::size_t first = lo, last = hi - 1;
    while (dst[first] == 0) ++first;
    while (dst[last] == 0) --last;
    if (min_replicates > 1) {
      std::int64_t total = 0;
      for (std::size_t i = first; i <= last; ++i) total += std::popcount(dst[i]);
      if (total < min_replicates) break;
    }
    if (keep_pass(out, cur, dst, other, lo, hi, j, first, last, nonzero, sparse_ratio)) break;
  }
  return finish(out, cur, lo, hi, lo_ref, hi_ref);
}

SL_PORTABLE_KERNEL std::int64_t count_and_portable(const std::uint64_t* a, const std::uint64_t* b, std::size_t n) {
  std::int64_t t = 0;
  for (std::size_t i = 0; i < n; ++i) t += std::popcount(a[i] & b[i]);
  return t;
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

// Which of the (up to) eight words from `at` (below `end`) are non-zero, as bits.
SL_AVX512_KERNEL inline unsigned words_set(const std::uint64_t* words, std::size_t at, std::size_t end) {
  const __m512i a = _mm512_loadu_si512(words + at);
  return static_cast<unsigned>(_mm512_mask_test_epi64_mask(lanes_left(end - at), a, a));
}

template <bool kPure>
SL_AVX512_KERNEL Narrowed narrow_avx512_with(const std::uint64_t* start, std::uint64_t* a_buf, std::uint64_t* b_buf,
                                             const EventPlanes& plane, std::size_t m, std::size_t& lo_ref,
                                             std::size_t& hi_ref, std::int64_t min_replicates, std::size_t sparse_ratio,
                                             const CategoryPlanes* pure) {
  // Local copies: stores through the word pointers could otherwise alias these.
  const std::uint64_t* cur = start;
  std::uint64_t* dst = a_buf;    // where the next pass writes: never `cur`
  std::uint64_t* other = b_buf;
  std::size_t lo = lo_ref, hi = hi_ref;
  Narrowed out;
  for (std::size_t j = 0; j < m; ++j) {
    if (hi - lo <= 16) {
      // Two vectors or less: keep them in registers for the remaining planes (no stores, no
      // trimming between planes; a pass costs a few instructions).
      const __mmask8 lanes0 = lanes_left(hi - lo), lanes1 = hi - lo > 8 ? lanes_left(hi - lo - 8) : 0;
      __m512i a0 = _mm512_maskz_mov_epi64(lanes0, _mm512_loadu_si512(cur + lo));
      __m512i a1 = _mm512_maskz_mov_epi64(lanes1, _mm512_loadu_si512(cur + lo + 8));
      const std::size_t kept_before = out.kept;
      for (; j < m; ++j) {
        if constexpr (kPure) {
          const unsigned set = _mm512_test_epi64_mask(a0, a0) | static_cast<unsigned>(_mm512_test_epi64_mask(a1, a1)) << 8;
          const unsigned w = static_cast<unsigned>(std::countr_zero(set));  // the set is never empty here
          alignas(64) std::uint64_t lanes[16];
          _mm512_store_si512(lanes, a0);
          _mm512_store_si512(lanes + 8, a1);
          const std::uint64_t word = lanes[w];
          const int q = category_of(*pure, lo + w, static_cast<unsigned>(std::countr_zero(word)));
          const std::uint64_t* c = pure->planes + static_cast<std::size_t>(q) * pure->words + lo;
          const __m512i rest = _mm512_or_si512(_mm512_maskz_andnot_epi64(0xFF, _mm512_loadu_si512(c), a0),
                                               _mm512_maskz_andnot_epi64(0xFF, _mm512_loadu_si512(c + 8), a1));
          if (_mm512_test_epi64_mask(rest, rest) == 0) {
            out.category = q;
            break;
          }
        }
        out.words += hi - lo;
        const __m512i b0 = _mm512_and_si512(a0, _mm512_loadu_si512(plane[j] + lo));
        const __m512i b1 = _mm512_and_si512(a1, _mm512_loadu_si512(plane[j] + lo + 8));
        if (min_replicates > 1) {
          if (sum_lanes(_mm512_add_epi64(_mm512_popcnt_epi64(b0), _mm512_popcnt_epi64(b1))) < min_replicates) break;
        } else if (_mm512_test_epi64_mask(_mm512_or_si512(b0, b1), _mm512_or_si512(b0, b1)) == 0) {
          break;
        }
        a0 = b0;
        a1 = b1;
        out.kept = j + 1;
      }
      if (out.kept == kept_before) break;  // nothing added: the set stays where it is (and is in place)
      _mm512_storeu_si512(dst + lo, a0);
      _mm512_storeu_si512(dst + lo + 8, a1);
      cur = dst;
      const unsigned set = _mm512_test_epi64_mask(a0, a0) | static_cast<unsigned>(_mm512_test_epi64_mask(a1, a1)) << 8;
      hi = lo + 16 - static_cast<std::size_t>(std::countl_zero(set << 16));  // set != 0: a plane was kept
      lo += static_cast<std::size_t>(std::countr_zero(set));
      break;
    }
    const std::uint64_t* p = plane[j];
    // No data-dependent branch inside a pass: which words survive varies from call to call. The
    // first and last non-zero vectors are kept with conditional moves, then refined to words.
    std::size_t nonzero = 0;
    std::size_t f = hi, l = hi;
    // With `pure`, the same pass checks whether the set it starts from holds only the code of its
    // first centre (lanes holding centres outside that code's plane: `impure`).
    const int q = kPure ? first_category(*pure, cur, lo) : 0;
    const std::uint64_t* c = kPure ? pure->planes + static_cast<std::size_t>(q) * pure->words : p;
    unsigned impure = 0;
    for (std::size_t i = lo; i < hi; i += 8) {
      // Whole vectors (the arrays have room past hi): masked stores would stall the loads of the
      // next pass, which read them back. Lanes past hi are left out of the counts.
      const __mmask8 lanes = lanes_left(hi - i);
      const __m512i s = _mm512_loadu_si512(cur + i);
      const __m512i a = _mm512_and_si512(s, _mm512_loadu_si512(p + i));
      _mm512_storeu_si512(dst + i, a);
      const unsigned set = _mm512_mask_test_epi64_mask(lanes, a, a);
      if constexpr (kPure)
        impure |= _mm512_mask_test_epi64_mask(lanes, s, _mm512_maskz_andnot_epi64(0xFF, _mm512_loadu_si512(c + i), s));
      nonzero += static_cast<std::size_t>(std::popcount(set));
      f = (f == hi && set != 0) ? i : f;
      l = set != 0 ? i : l;
    }
    if (kPure && impure == 0) {
      out.category = q;
      break;
    }
    out.words += hi - lo;
    if (nonzero == 0) break;
    const std::size_t first = f + static_cast<std::size_t>(std::countr_zero(words_set(dst, f, hi)));
    const std::size_t last = l + 31 - static_cast<std::size_t>(std::countl_zero(words_set(dst, l, hi)));
    if (min_replicates > 1) {
      __m512i acc = _mm512_setzero_si512();
      for (std::size_t i = first; i <= last; i += 8)
        acc = _mm512_add_epi64(acc, _mm512_popcnt_epi64(_mm512_maskz_mov_epi64(lanes_left(last + 1 - i), _mm512_loadu_si512(dst + i))));
      if (sum_lanes(acc) < min_replicates) break;
    }
    if (keep_pass(out, cur, dst, other, lo, hi, j, first, last, nonzero, sparse_ratio)) break;
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

SL_AVX512_KERNEL std::int64_t count_and_avx512(const std::uint64_t* a, const std::uint64_t* b, std::size_t n) {
  __m512i acc = _mm512_setzero_si512();
  for (std::size_t i = 0; i < n; i += 8) {
    acc = _mm512_add_epi64(acc, _mm512_popcnt_epi64(_mm512_maskz_and_epi64(lanes_left(n - i), _mm512_loadu_si512(a + i),
                                                                            _mm512_loadu_si512(b + i))));
  }
  return sum_lanes(acc);
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
