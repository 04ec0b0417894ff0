// Counter-based random numbers: every draw is a pure function of (seed, level, cell, stream), so a
// simulation gives identical results whatever the number of threads or the order they run in.
//
// The mixer is the 64-bit finaliser of SplitMix64 (Steele, Lea & Flood 2014, "Fast splittable
// pseudorandom number generators", OOPSLA), applied to the key words in turn with distinct odd
// constants; the result passes a chi-square uniformity test (tests/test_random.py).
#pragma once

#include <cstdint>

namespace sl {

// Named streams keep the purposes of draws apart (path order, category choice, candidate start...).
enum class Stream : std::uint32_t {
  path = 1,
  draw = 2,
  start = 3,
  user = 100,
};

namespace detail {
__extension__ typedef unsigned __int128 u128;
inline constexpr std::uint64_t mix64(std::uint64_t z) noexcept {
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
  return z ^ (z >> 31);
}
}  // namespace detail

// The draws of many cells under one (seed, level, stream): the part of the key they share is
// mixed once, so each cell costs one mix. CellBits(seed, level, stream)(cell) is
// random_bits(seed, level, cell, stream).
class CellBits {
 public:
  constexpr CellBits(std::uint64_t seed, std::uint32_t level, std::uint32_t stream) noexcept
      : shared_(detail::mix64(detail::mix64(seed + 0x9e3779b97f4a7c15ULL) ^
                              (std::uint64_t{level} << 32 | stream) * 0xd6e8feb86659fd93ULL)) {}
  constexpr CellBits(std::uint64_t seed, std::uint32_t level, Stream stream) noexcept
      : CellBits(seed, level, static_cast<std::uint32_t>(stream)) {}
  constexpr std::uint64_t operator()(std::uint64_t cell) const noexcept {
    return detail::mix64(shared_ ^ (cell + 0x632be59bd9b4e019ULL) * 0x9e3779b97f4a7c15ULL);
  }

 private:
  std::uint64_t shared_;
};

// 64 random bits for (seed, level, cell, stream).
inline constexpr std::uint64_t random_bits(std::uint64_t seed, std::uint32_t level, std::uint64_t cell,
                                           std::uint32_t stream) noexcept {
  return CellBits(seed, level, stream)(cell);
}

inline constexpr std::uint64_t random_bits(std::uint64_t seed, std::uint32_t level, std::uint64_t cell,
                                           Stream stream) noexcept {
  return random_bits(seed, level, cell, static_cast<std::uint32_t>(stream));
}

// Uniform double in [0, 1) from the top 53 bits.
inline constexpr double to_unit(std::uint64_t bits) noexcept {
  return static_cast<double>(bits >> 11) * 0x1.0p-53;
}

inline constexpr double uniform(std::uint64_t seed, std::uint32_t level, std::uint64_t cell,
                                Stream stream) noexcept {
  return to_unit(random_bits(seed, level, cell, stream));
}

// A small sequential generator seeded from a counter key, for work that needs several draws at one
// cell (for example the start of a scan). Same key, same sequence.
class KeyedGenerator {
 public:
  constexpr KeyedGenerator(std::uint64_t seed, std::uint32_t level, std::uint64_t cell, Stream stream) noexcept
      : state_(random_bits(seed, level, cell, stream)) {}
  constexpr std::uint64_t next() noexcept {
    state_ += 0x9e3779b97f4a7c15ULL;
    return detail::mix64(state_);
  }
  constexpr double unit() noexcept { return to_unit(next()); }
  // Uniform integer in [0, n), n > 0 (Lemire's multiply-shift; bias below 2**-32 for n < 2**32).
  constexpr std::uint64_t below(std::uint64_t n) noexcept {
    return static_cast<std::uint64_t>((static_cast<detail::u128>(next()) * n) >> 64);
  }

 private:
  std::uint64_t state_;
};

}  // namespace sl
