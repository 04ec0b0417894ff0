// Unit tests of the pattern tree: tree walk against the centre-by-centre check, node dropping,
// simulation invariants (hard data, determinism across thread counts), cancellation.
#include <algorithm>
#include <bit>
#include <cstdlib>
#include <random>

#include "core/error.hpp"
#include "merge/tau.hpp"
#include "tests/check.hpp"
#include "tree/bit_planes.hpp"
#include "tree/event_gather.hpp"
#include "tree/pattern_tree.hpp"
#include "tree/tree_sim.hpp"

using namespace sl;

namespace {

CategoricalImage random_image(const Ijk& shape, int K, unsigned seed, double masked = 0.1) {
  CategoricalImage ti;
  ti.shape = shape;
  ti.categories = K;
  std::mt19937 gen(seed);
  std::uniform_int_distribution<int> code(0, K - 1);
  std::uniform_real_distribution<double> u(0, 1);
  ti.codes.resize(static_cast<std::size_t>(shape[0] * shape[1] * shape[2]));
  for (auto& c : ti.codes) c = u(gen) < masked ? CategoricalImage::kMasked : static_cast<std::uint8_t>(code(gen));
  ti.codes[0] = 0;
  return ti;
}

}  // namespace

SL_TEST(tree_walk_matches_centre_check) {
  const auto ti = random_image({4, 12, 12}, 3, 1);
  const PatternTree tree(ti, Template::box({1, 1, 1}), 2, std::int64_t{1} << 30);
  std::mt19937 gen(2);
  QueryScratch a, b;
  for (int trial = 0; trial < 300; ++trial) {
    const int level = static_cast<int>(gen() % 2);
    std::vector<std::int32_t> index;
    for (std::int32_t i = 0; i < 26; ++i)
      if (gen() % 3 == 0) index.push_back(i);
    std::vector<std::uint8_t> value(index.size());
    for (auto& v : value) v = static_cast<std::uint8_t>(gen() % 3);
    const auto m = static_cast<int>(index.size());
    const std::int64_t min_rep = 1 + static_cast<std::int64_t>(gen() % 3);
    const auto x = tree.query(level, index.data(), value.data(), m, min_rep, false, a);
    const auto y = tree.scan(level, index.data(), value.data(), m, min_rep, b);
    SL_CHECK(x.replicates == y.replicates && x.kept == y.kept && a.best == b.best);
  }
}

SL_TEST(ordered_tree_matches_centre_check_in_its_order) {
  // A tree whose nodes come in another order answers events given in that order, dropping the
  // last of that order first; the centre-by-centre check of the same nodes must agree.
  const auto ti = random_image({4, 12, 12}, 3, 3);
  const PatternTree tree(ti, Template::box({1, 1, 1}), 2, std::int64_t{1} << 30);
  std::mt19937 gen(4);
  std::vector<std::int32_t> order(26);
  for (std::int32_t i = 0; i < 26; ++i) order[static_cast<std::size_t>(i)] = i;
  QueryScratch a, b;
  for (int variant = 0; variant < 4; ++variant) {
    std::shuffle(order.begin(), order.end(), gen);
    const int level = variant % 2;
    const PatternTree::Level* ordered = tree.ordered_variant(level, order);
    SL_CHECK(ordered != nullptr);
    SL_CHECK(tree.ordered_variant(level, order) == ordered);  // built once, then found
    for (int trial = 0; trial < 100; ++trial) {
      std::vector<std::int32_t> position, node;  // positions in `order`, and their template nodes
      for (std::int32_t i = 0; i < 26; ++i)
        if (gen() % 3 != 0) {
          position.push_back(i);
          node.push_back(order[static_cast<std::size_t>(i)]);
        }
      std::vector<std::uint8_t> value(position.size());
      for (auto& v : value) v = static_cast<std::uint8_t>(gen() % 3);
      const auto m = static_cast<int>(position.size());
      const std::int64_t min_rep = 1 + static_cast<std::int64_t>(gen() % 3);
      const auto x = tree.query_variant(*ordered, position.data(), value.data(), m, min_rep, false, a);
      const auto y = tree.scan(level, node.data(), value.data(), m, min_rep, b);
      SL_CHECK(x.replicates == y.replicates && x.kept == y.kept && a.best == b.best);
    }
  }
}

SL_TEST(stopping_at_one_category_keeps_the_probabilities) {
  // Queries that stop once one category is left (as simulation asks), answered by the walk, the
  // bit planes or the lead answers, against the full counts: the same counts when several
  // categories remain, the same single category otherwise.
  CategoricalImage ti;
  ti.shape = {1, 40, 40};
  ti.categories = 3;
  std::mt19937 gen(5);
  for (Index y = 0; y < 40; ++y)
    for (Index x = 0; x < 40; ++x)
      ti.codes.push_back(gen() % 40 == 0 ? static_cast<std::uint8_t>(gen() % 3) : static_cast<std::uint8_t>((y / 4 + x / 6) % 3));
  const Template tpl = Template::ellipsoid({0, 3, 3}, 0);
  const PatternTree tree(ti, tpl, 1, std::int64_t{1} << 30);
  QueryScratch a, b;
  int remembered = 0, checked = 0, single = 0;
  for (int trial = 0; trial < 600; ++trial) {
    // An event read around a TI cell (so that it has replicates), some nodes left out.
    const Index cy = 3 + static_cast<Index>(gen() % 34), cx = 3 + static_cast<Index>(gen() % 34);
    std::vector<std::int32_t> index;
    std::vector<std::uint8_t> value;
    const unsigned informed = 1 + gen() % 3;  // in quarters
    for (std::size_t i = 0; i < tpl.size(); ++i) {
      if (gen() % 4 >= informed) continue;
      const Offset& o = tpl.offsets()[i];
      index.push_back(static_cast<std::int32_t>(i));
      value.push_back(ti.codes[static_cast<std::size_t>((cy + o[1]) * 40 + cx + o[2])]);
    }
    const auto m = static_cast<int>(index.size());
    const std::int64_t min_rep = 1 + static_cast<std::int64_t>(gen() % 4);
    for (int again = 0; again < 2; ++again) {  // the second time from the lead answers when kept
      const auto x = tree.query(0, index.data(), value.data(), m, min_rep, true, a);
      const auto y = tree.scan(0, index.data(), value.data(), m, min_rep, b);
      int present = 0;
      for (auto c : b.best) present += c > 0;
      if (present > 1) {
        SL_CHECK(a.best == b.best && x.kept == y.kept && !x.remembered);
      } else {
        for (std::size_t q = 0; q < 3; ++q) SL_CHECK((a.best[q] > 0) == (b.best[q] > 0));
        SL_CHECK(x.kept <= y.kept && x.replicates >= y.replicates);
        ++single;
      }
      remembered += x.remembered;
      ++checked;
    }
  }
  // Every way was taken (here about 120 lead answers and 810 single categories of 1200).
  SL_CHECK(remembered > checked / 20 && single > remembered && checked - single > checked / 10);
}

SL_TEST(one_and_two_node_events_match_centre_check) {
  // Events of one informed node are answered from counts kept per bit plane, of two from counts
  // kept per pair (asked twice: computed, then found), dropping the second node when it leaves
  // too few replicates.
  const auto ti = random_image({3, 9, 11}, 4, 8);
  const PatternTree tree(ti, Template::box({1, 1, 1}), 2, std::int64_t{1} << 30);
  QueryScratch a, b;
  int dropped = 0;
  for (int level = 0; level < 2; ++level)
    for (std::int32_t i = 0; i < 26; ++i)
      for (std::int32_t j = i; j < 26; ++j)
        for (std::uint8_t v = 0; v < 4; ++v)
          for (std::uint8_t w = 0; w < 4; ++w)
            for (std::int64_t min_rep : {1, 5, 40})
              for (int again = 0; again < 2; ++again) {
                const std::int32_t index[2] = {i, j};
                const std::uint8_t value[2] = {v, w};
                const int m = i == j ? 1 : 2;
                const auto x = tree.query(level, index + 2 - m, value + 2 - m, m, min_rep, false, a);
                const auto y = tree.scan(level, index + 2 - m, value + 2 - m, m, min_rep, b);
                SL_CHECK(x.replicates == y.replicates && x.kept == y.kept && a.best == b.best);
                dropped += m == 2 && x.kept == 1;
              }
  SL_CHECK(dropped > 100);
}

SL_TEST(tree_counts_the_border_as_the_contract_says) {
  CategoricalImage ti;
  ti.shape = {1, 1, 3};
  ti.categories = 2;
  ti.codes = {0, 1, 0};
  const PatternTree tree(ti, Template({{0, 0, 1}}), 1, std::int64_t{1} << 30);
  QueryScratch sc;
  const std::int32_t index[1] = {0};
  const std::uint8_t value[1] = {1};
  const auto a = tree.query(0, index, value, 1, 1, false, sc);
  SL_CHECK(a.replicates == 1 && a.kept == 1 && sc.best[0] == 1 && sc.best[1] == 0);
}

SL_TEST(tree_rejects_unusable_input) {
  CategoricalImage masked;
  masked.shape = {1, 2, 2};
  masked.categories = 1;
  masked.codes.assign(4, CategoricalImage::kMasked);
  SL_CHECK_THROWS(PatternTree(masked, Template({{0, 0, 1}}), 1, 1 << 20), ParameterError);
  SL_CHECK_THROWS(PatternTree(random_image({1, 4, 4}, 2, 3), Template::box({0, 4, 4}), 1, 1 << 20), ParameterError);
  SL_CHECK_THROWS(PatternTree(random_image({1, 40, 40}, 3, 3), Template::box({0, 2, 2}), 1, 5000), MemoryLimitError);
}

SL_TEST(simulation_honours_hard_data_and_is_thread_independent) {
  const PatternTree tree(random_image({6, 20, 20}, 3, 4, 0.0), Template::ellipsoid({1, 2, 2}, 20), 2,
                         std::int64_t{1} << 30);
  const Grid grid({5, 17, 19});
  std::vector<std::int16_t> hard(static_cast<std::size_t>(grid.size()), -1);
  for (std::size_t i = 0; i < hard.size(); i += 37) hard[i] = static_cast<std::int16_t>(i % 3);
  TreeSimOptions opt;
  opt.seed = 9;
  opt.tau = {1.0};
  opt.threads = 1;
  const auto one = simulate_tree(tree, grid, hard, opt, Poll{}, nullptr);
  opt.threads = 3;
  const auto three = simulate_tree(tree, grid, hard, opt, Poll{}, nullptr);
  SL_CHECK(one == three);
  for (std::size_t i = 0; i < hard.size(); ++i) {
    SL_CHECK(one[i] >= 0 && one[i] < 3);
    if (hard[i] >= 0) SL_CHECK(one[i] == hard[i]);
  }
}

SL_TEST(simulation_stops_when_asked) {
  const PatternTree tree(random_image({4, 16, 16}, 2, 5, 0.0), Template::box({1, 1, 1}), 1, std::int64_t{1} << 30);
  TreeSimOptions opt;
  opt.tau = {1.0};
  opt.threads = 2;
  SL_CHECK_THROWS(simulate_tree(tree, Grid({30, 60, 60}), {}, opt, [](std::int64_t, std::int64_t) { return false; },
                                nullptr),
                  Cancelled);
}

SL_TEST(tau_merge_worked_values) {
  // Journel 2002: prior 0.5, sources 0.5 and 0.8 -> 0.8; a certain source decides.
  const double prior[2] = {0.5, 0.5}, src[4] = {0.5, 0.5, 0.8, 0.2}, tau[2] = {1, 1};
  double out[2];
  tau_merge(prior, src, tau, 2, 2, out);
  SL_CHECK(std::abs(out[0] - 0.8) < 1e-12);
  const double certain[4] = {1.0, 0.0, 0.3, 0.7};
  tau_merge(prior, certain, tau, 2, 2, out);
  SL_CHECK(out[0] == 1.0 && out[1] == 0.0);
}

SL_TEST(empty_event_gives_the_proportions) {
  const auto ti = random_image({1, 9, 9}, 3, 4);
  const PatternTree tree(ti, Template::box({0, 1, 1}), 1, std::int64_t{1} << 30);
  QueryScratch a, b;
  const auto x = tree.query(0, nullptr, nullptr, 0, 1, false, a);
  const auto y = tree.scan(0, nullptr, nullptr, 0, 1, b);
  SL_CHECK(x.kept == 0 && y.kept == 0 && x.replicates == tree.centre_count() && y.replicates == tree.centre_count());
  SL_CHECK(a.best == tree.category_counts() && b.best == tree.category_counts());
}

SL_TEST(event_gather_matches_a_direct_read) {
  // Both versions (vector where the processor has it, plain loop) against reading every template
  // node with bounds tests, near the faces and inside, on 2-D and 3-D grids at several steps.
  std::mt19937_64 gen(21);
  for (int trial = 0; trial < 300; ++trial) {
    const bool flat = trial % 2 == 0;
    const Grid grid({flat ? 1 : 1 + static_cast<Index>(gen() % 9), 1 + static_cast<Index>(gen() % 40),
                     1 + static_cast<Index>(gen() % 40)});
    const Index step = Index{1} << (gen() % 3);
    const Template tpl = Template::ellipsoid({flat ? 0.0 : 2.5, 3.5, 3.5}, 1 + static_cast<std::int64_t>(gen() % 60));
    std::vector<std::int16_t> sim(static_cast<std::size_t>(grid.size()) + 1);
    for (auto& v : sim) v = gen() % 3 == 0 ? -1 : static_cast<std::int16_t>(gen() % 5);
    const EventGather fast(grid, tpl.offsets(), step);
    setenv("STRATALOOM_KERNELS", "portable", 1);
    const EventGather plain(grid, tpl.offsets(), step);
    unsetenv("STRATALOOM_KERNELS");
    const std::size_t room = tpl.size() + EventGather::kPad;
    for (int probe = 0; probe < 20; ++probe) {
      const Index cell = static_cast<Index>(gen() % static_cast<std::uint64_t>(grid.size()));
      const Ijk c = grid.cell(cell);
      const int cap = gen() % 3 == 0 ? 1 + static_cast<int>(gen() % 8) : static_cast<int>(tpl.size());
      std::vector<std::int32_t> want_index, fi(room), pi(room);
      std::vector<std::uint8_t> want_value, fv(room), pv(room);
      for (std::size_t i = 0; i < tpl.size() && static_cast<int>(want_index.size()) < cap; ++i) {
        const Offset& o = tpl.offsets()[i];
        const Ijk q{c[0] + o[0] * step, c[1] + o[1] * step, c[2] + o[2] * step};
        if (!grid.contains(q) || sim[static_cast<std::size_t>(grid.index(q))] < 0) continue;
        want_index.push_back(static_cast<std::int32_t>(i));
        want_value.push_back(static_cast<std::uint8_t>(sim[static_cast<std::size_t>(grid.index(q))]));
      }
      const int mf = fast.gather(sim.data(), cell, c, cap, fi.data(), fv.data());
      const int mp = plain.gather(sim.data(), cell, c, cap, pi.data(), pv.data());
      SL_CHECK(mf == static_cast<int>(want_index.size()) && mp == mf);
      SL_CHECK(std::equal(want_index.begin(), want_index.end(), fi.begin()) &&
               std::equal(want_index.begin(), want_index.end(), pi.begin()));
      SL_CHECK(std::equal(want_value.begin(), want_value.end(), fv.begin()) &&
               std::equal(want_value.begin(), want_value.end(), pv.begin()));
    }
  }
}

SL_TEST(bit_plane_kernels_agree) {
  // The AVX-512 kernels (where the processor has them) and the plain loops give the same sets.
  const planes::Kernels& fast = planes::best();
  const planes::Kernels& plain = planes::portable();
  std::mt19937_64 gen(11);
  int stopped_pure = 0;
  for (int trial = 0; trial < 800; ++trial) {
    const std::size_t words = 1 + gen() % 200;
    const std::size_t m = 1 + gen() % 12;
    std::vector<std::uint64_t> all((m + 1) * words + planes::kPadWords);
    // Planes of varied density: a random word ANDed with 0 to 2 more keeps about 1/2 to 1/8.
    for (auto& w : all) {
      w = gen();
      for (unsigned k = gen() % 3; k > 0; --k) w &= gen();
      if (gen() % 5 == 0) w = 0;
    }
    std::vector<std::int32_t> plane_index(m);
    const std::vector<std::uint8_t> plane_value(m, 0);
    for (std::size_t j = 0; j < m; ++j) plane_index[j] = static_cast<std::int32_t>(j + 1);
    const planes::EventPlanes plane{all.data(), plane_index.data(), plane_value.data(), 1, words};
    std::size_t lo = gen() % words, hi = lo + 1 + gen() % (words - lo);
    all[lo] |= 1;  // the first and last word of the set are non-zero
    all[hi - 1] |= std::uint64_t{1} << 63;
    const std::int64_t min_rep = 1 + static_cast<std::int64_t>(gen() % 4);
    const std::size_t ratio = gen() % 2 ? 16 : 40;
    // Half the trials stop once one code is left: K code planes, every centre in one of them,
    // words mostly of one code so that sets often become pure; in some trials runs of 40 words
    // share their code, so that sets over more than two vectors become pure too.
    const std::size_t K = 1 + gen() % 4;
    std::vector<std::uint64_t> codes(K * words + planes::kPadWords, 0);
    const std::size_t code_run = gen() % 2 ? 1 : 40;
    std::size_t main_code = 0;
    for (std::size_t w = 0; w < words; ++w) {
      if (w % code_run == 0) main_code = gen() % K;
      const bool mixed = gen() % 4 == 0;
      for (unsigned bit = 0; bit < 64; ++bit)
        codes[(mixed ? gen() % K : main_code) * words + w] |= std::uint64_t{1} << bit;
    }
    const planes::CategoryPlanes code_planes{codes.data(), words, K};
    const planes::CategoryPlanes* pure = gen() % 2 ? &code_planes : nullptr;
    auto code_of_set = [&](const std::vector<std::uint64_t>& set) {  // the one code of a set, or -1
      int found = -1;
      for (std::size_t q = 0; q < K; ++q)
        for (std::size_t w = 0; w < words; ++w)
          if (set[w] & codes[q * words + w]) {
            if (found >= 0 && found != static_cast<int>(q)) return -1;
            found = static_cast<int>(q);
          }
      return found;
    };
    auto first_code = [&](const std::vector<std::uint64_t>& set) {  // the code of the set's first centre
      for (std::size_t w = 0; w < words; ++w)
        if (set[w] != 0)
          for (std::size_t q = 0; q < K; ++q)
            if (codes[q * words + w] & (set[w] & (~set[w] + 1))) return static_cast<int>(q);
      return -1;
    };
    auto only_code = [&](const std::vector<std::uint64_t>& set, int q) {  // every centre of the set holds q
      for (std::size_t w = 0; w < words; ++w)
        if (set[w] & ~codes[static_cast<std::size_t>(q) * words + w]) return false;
      return true;
    };
    auto after_planes = [&](std::size_t t) {  // the start set ANDed with the first t planes
      std::vector<std::uint64_t> set(words, 0);
      for (std::size_t w = lo; w < hi; ++w) {
        set[w] = all[w];
        for (std::size_t j = 0; j < t; ++j) set[w] &= plane[j][w];
      }
      return set;
    };
    // Whether the kernels, checking codes per group, would have stopped at the set after t planes:
    // at a group's start on any one code, inside a group on the code of the group's first centre.
    auto stops_at = [&](std::size_t t) {
      const std::vector<std::uint64_t> set = after_planes(t);
      if (t % planes::kGroupPlanes == 0) return code_of_set(set) >= 0;
      return only_code(set, first_code(after_planes(t - t % planes::kGroupPlanes)));
    };
    // The start set is only read: the kernels write to the two buffers.
    const std::vector<std::uint64_t> start(all.begin(), all.begin() + static_cast<std::ptrdiff_t>(words + planes::kPadWords));
    std::vector<std::uint64_t> a(words + planes::kPadWords), a2(a), b(a), b2(a);
    std::size_t lo_a = lo, hi_a = hi, lo_b = lo, hi_b = hi;
    const auto x = fast.narrow(start.data(), a.data(), a2.data(), plane, m, lo_a, hi_a, min_rep, ratio, pure);
    const auto y = plain.narrow(start.data(), b.data(), b2.data(), plane, m, lo_b, hi_b, min_rep, ratio, pure);
    SL_CHECK(std::equal(start.begin(), start.begin() + static_cast<std::ptrdiff_t>(words), all.begin()));
    const std::uint64_t* ra = x.set;
    const std::uint64_t* rb = y.set;
    SL_CHECK(x.kept == y.kept && x.sparse == y.sparse && x.category == y.category && x.count == y.count);
    SL_CHECK(pure != nullptr || x.category == -1);
    // Exactness against a word-by-word reference: the set kept is the AND of the first `kept`
    // planes, and one more plane would leave fewer than min_rep centres (unless it stopped early).
    const std::vector<std::uint64_t> kept_set = after_planes(x.kept);
    std::int64_t total = 0;
    for (std::uint64_t v : kept_set) total += std::popcount(v);
    SL_CHECK(x.kept == 0 || total >= min_rep);
    if (x.category >= 0) {
      // Stopped on one code: no set or bounds given, the count is the set's.
      SL_CHECK(x.set == nullptr && y.set == nullptr && lo_a == lo && hi_a == hi && lo_b == lo && hi_b == hi);
      SL_CHECK(code_of_set(kept_set) == x.category && x.count == total && stops_at(x.kept));
    } else {
      SL_CHECK((x.kept == 0) == (ra == start.data()));
      SL_CHECK(lo_a == lo_b && hi_a == hi_b && std::equal(ra + lo_a, ra + hi_a, rb + lo_b));
      SL_CHECK(ra[lo_a] != 0 && ra[hi_a - 1] != 0);
      for (std::size_t w = lo; w < hi; ++w) SL_CHECK((w >= lo_a && w < hi_a) ? kept_set[w] == ra[w] : kept_set[w] == 0);
      if (pure && !x.sparse && x.kept < m) SL_CHECK(!stops_at(x.kept));
    }
    stopped_pure += x.category >= 0;
    // It stops at the first set it can tell holds one code, and only there.
    if (pure)
      for (std::size_t t = 0; t < x.kept; ++t) SL_CHECK(!stops_at(t));
    if (!x.sparse && x.category < 0 && x.kept < m) {
      std::int64_t after = 0;
      for (std::size_t w = lo; w < hi; ++w) {
        std::uint64_t v = all[w];
        for (std::size_t j = 0; j <= x.kept; ++j) v &= plane[j][w];
        after += std::popcount(v);
      }
      SL_CHECK(after < min_rep);
    }
    const std::size_t n = 1 + gen() % words;
    SL_CHECK(fast.count_and(all.data(), all.data() + words, n) == plain.count_and(all.data(), all.data() + words, n));
  }
  SL_CHECK(stopped_pure > 100);  // the stop on one code was exercised
}
