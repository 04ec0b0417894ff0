// Kernels over bit sets stored as arrays of 64-bit words (one bit per training-image centre): the
// inner loops of pattern-tree queries. Two sets of kernels give identical results: plain loops the
// compiler vectorises, and AVX-512 ones with a vector popcount, chosen once per process where the
// processor has them.
#pragma once

#include <cstddef>
#include <cstdint>

namespace sl::planes {

// The centre category of every centre as K bit planes of `words` words each (plane q: "the centre
// holds code q"), for stopping a narrowing once one category is left.
struct CategoryPlanes {
  const std::uint64_t* planes = nullptr;
  std::size_t words = 0;
  std::size_t count = 0;  // K
};

// The planes of an event's informed nodes: plane j is the one of template position index[j]
// holding code value[j], at base + (index[j] * codes + value[j]) * words. Computed as the
// narrowing reaches it (it usually stops well before the last node).
struct EventPlanes {
  const std::uint64_t* base = nullptr;
  const std::int32_t* index = nullptr;
  const std::uint8_t* value = nullptr;
  std::size_t codes = 0;  // K
  std::size_t words = 0;
  const std::uint64_t* operator[](std::size_t j) const {
    return base + (static_cast<std::size_t>(index[j]) * codes + value[j]) * words;
  }
  // The planes from node j on.
  EventPlanes from(std::size_t j) const { return {base, index + j, value + j, codes, words}; }
};

// A candidate set narrowed by informed nodes (see Kernels::narrow).
struct Narrowed {
  std::size_t kept = 0;                  // planes ANDed in before the set would have too few centres
  bool sparse = false;                   // stopped early: few non-empty words over a wide span
  int category = -1;                     // stopped early: every centre of the set holds this code
  std::int64_t count = -1;               // with `category`: the centres of the set kept
  const std::uint64_t* set = nullptr;    // the words of the set kept (the start set or a buffer);
                                         // nullptr with `category` (its count is all that is needed)
  std::size_t words = 0;                 // words ANDed, over all planes
};

// Planes are taken in groups of this many: one sweep over the set ANDs a whole group.
inline constexpr std::size_t kGroupPlanes = 4;

// Words every array handed to the kernels must have past the last one it is read at: the
// kernels read and write whole vectors of eight words from the set's first word on, two at a
// time in the register path.
inline constexpr std::size_t kPadWords = 16;

struct Kernels {
  const char* name;
  // Node dropping on bit planes. `start` holds the candidate set in its words [lo, hi) (the words
  // outside [lo, hi) may hold anything); it is only read. ANDs the set with plane[0],
  // plane[1], ..., plane[m - 1] (whole planes, read at [lo, hi)) while the result keeps at least
  // `min_replicates` centres (and at least one), narrowing [lo, hi) to the words still non-zero;
  // the results go to the buffers `a` and `b` (each as long as a plane). The planes come in
  // groups of kGroupPlanes from plane[0]; after a group it stops (the group counted in kept) once
  // the span is over 16 words and fewer than one word in `sparse_ratio` of it is non-zero.
  // With `pure` given, it also stops once every centre of the set holds one code (more planes
  // cannot change the probabilities): before a group, when the set holds only the code q of its
  // first centre, or after the first plane of the group that leaves only q. A set left with
  // another code is noticed at the next group, so kept may pass the first set with one code by
  // up to three planes. It then gives `category` (the code) and `count` (the centres of the set
  // kept); `set` is nullptr and lo, hi are left as they were. The start set must hold a centre,
  // its words at lo and hi - 1 non-zero (as every set kept is). Otherwise the set kept is
  // `set`[lo, hi), its first and last word non-zero (`start` itself when no plane was kept).
  // `words` counts the words ANDed by the planes kept or tried; it differs between kernel sets.
  Narrowed (*narrow)(const std::uint64_t* start, std::uint64_t* a, std::uint64_t* b, const EventPlanes& plane,
                     std::size_t m, std::size_t& lo, std::size_t& hi, std::int64_t min_replicates,
                     std::size_t sparse_ratio, const CategoryPlanes* pure);
  // Bits set in a[i] & b[i] over i < n.
  std::int64_t (*count_and)(const std::uint64_t* a, const std::uint64_t* b, std::size_t n);
};

// Kernels on a list of candidate words (for sets with few non-empty words over a wide span).
// Copies the candidate words whose centres still match `plane` to out_index/out_alive, returns how
// many there are and adds the centres still matching to `total`.
std::size_t keep_matching(const std::uint32_t* word_index, const std::uint64_t* word_alive, std::size_t n,
                          const std::uint64_t* plane, std::uint32_t* out_index, std::uint64_t* out_alive,
                          std::int64_t& total);
// Counts the candidate centres per centre category into counts[0..K) (`category`: K planes of
// `words` words).
void count_categories(const std::uint32_t* word_index, const std::uint64_t* word_alive, std::size_t n,
                      const std::uint64_t* category, std::size_t words, std::size_t K, std::int64_t* counts);

// Whether the environment variable STRATALOOM_KERNELS is "portable" (read at each call): every
// vector kernel of the tree engine then uses its plain loop.
bool portable_kernels_asked();

// The fastest kernels this processor runs, unless the environment variable STRATALOOM_KERNELS is
// "portable" (for measuring and testing the plain loops on any machine).
const Kernels& best();
// The plain loops (every processor).
const Kernels& portable();

}  // namespace sl::planes
