// Unit tests of cpp/core: grid index math, templates, random draws, paths, batches, the pool.
#include <random>
#include <algorithm>
#include <atomic>
#include <set>

#include "core/error.hpp"
#include "core/grid.hpp"
#include "core/path.hpp"
#include "core/pool.hpp"
#include "core/random.hpp"
#include "core/template.hpp"
#include "tests/check.hpp"

using namespace sl;

SL_TEST(grid_index_round_trip) {
  const Grid g({3, 4, 5});
  for (Index i = 0; i < g.size(); ++i) SL_CHECK(g.index(g.cell(i)) == i);
  SL_CHECK(g.index({1, 2, 3}) == (1 * 4 + 2) * 5 + 3);
}

SL_TEST(grid_locate_and_centre) {
  const Grid g({2, 2, 2}, {2, 1, 0.5}, {10, 0, -1});
  Ijk c{};
  SL_CHECK(g.locate(g.centre({1, 0, 1}), c) && c == Ijk({1, 0, 1}));
  SL_CHECK(!g.locate({9.99, 0.5, -0.5}, c));
  SL_CHECK(!g.locate({14.0, 0.5, -0.5}, c));  // the upper outer face is outside
}

SL_TEST(grid_rejects_bad_shape_and_spacing) {
  SL_CHECK_THROWS(Grid({0, 1, 1}), ParameterError);
  SL_CHECK_THROWS(Grid({1, 1, 1}, {1, 0, 1}), ParameterError);
}

SL_TEST(grid_levels) {
  const Grid g({1, 5, 9});
  SL_CHECK(g.level_extent(1, 2) == 5 && g.level_extent(2, 1) == 2);
  SL_CHECK(Grid::on_level({0, 4, 8}, 2) && !Grid::on_level({0, 2, 8}, 2));
}

SL_TEST(template_box_count_and_order) {
  const auto t = Template::box({1, 1, 1});
  SL_CHECK(t.size() == 26);
  // nearest first: the six face neighbours come first, in lexicographic order
  SL_CHECK(t.offsets()[0] == Offset({-1, 0, 0}) && t.offsets()[5] == Offset({1, 0, 0}));
}

SL_TEST(template_rejects_duplicates_and_centre) {
  SL_CHECK_THROWS(Template({{0, 0, 1}, {0, 0, 1}}), ParameterError);
  SL_CHECK_THROWS(Template({{0, 0, 0}}), ParameterError);
  SL_CHECK_THROWS(Template::box({200, 200, 200}), ParameterError);
}

SL_TEST(template_level_scaling) {
  const auto t = Template::ellipsoid({0, 2, 3}, 10).at_level(2);
  for (const auto& o : t.offsets()) SL_CHECK(o[0] == 0 && o[1] % 4 == 0 && o[2] % 4 == 0);
}

SL_TEST(random_draws_are_pure) {
  SL_CHECK(random_bits(7, 1, 99, Stream::draw) == random_bits(7, 1, 99, Stream::draw));
  SL_CHECK(random_bits(7, 1, 99, Stream::draw) != random_bits(7, 2, 99, Stream::draw));
  SL_CHECK(random_bits(7, 1, 99, Stream::draw) != random_bits(8, 1, 99, Stream::draw));
  SL_CHECK(random_bits(7, 1, 99, Stream::draw) != random_bits(7, 1, 99, Stream::path));
  double lo = 1, hi = 0;
  for (std::uint64_t c = 0; c < 10000; ++c) {
    const double u = uniform(1, 0, c, Stream::draw);
    lo = std::min(lo, u);
    hi = std::max(hi, u);
  }
  SL_CHECK(lo >= 0 && lo < 0.001 && hi < 1 && hi > 0.999);
}

SL_TEST(paths_cover_each_cell_once) {
  const Grid g({3, 7, 9});
  std::set<Index> all;
  for (int level = 2; level >= 0; --level) {
    auto p = level_cells(g, level, 2);
    shuffle_path(p, 5, level);
    for (Index c : p) SL_CHECK(all.insert(c).second);
  }
  SL_CHECK(static_cast<Index>(all.size()) == g.size());
}

SL_TEST(batches_are_conflict_free) {
  const Grid g({1, 40, 40});
  auto p = level_cells(g, 0, 0);
  shuffle_path(p, 3, 0);
  auto copy = p;
  const auto copy_path = p;
  const Offset reach{0, 2, 3};
  const auto starts = conflict_free_batches(g, 0, reach, p, 64);
  std::sort(copy.begin(), copy.end());
  auto sorted = p;
  std::sort(sorted.begin(), sorted.end());
  SL_CHECK(sorted == copy);
  SL_CHECK(starts.front() == 0 && starts.back() == static_cast<std::int64_t>(p.size()));
  for (std::size_t b = 0; b + 1 < starts.size(); ++b) {
    SL_CHECK(starts[b + 1] - starts[b] >= 1 && starts[b + 1] - starts[b] <= 64);
    for (auto i = starts[b]; i < starts[b + 1]; ++i)
      for (auto j = i + 1; j < starts[b + 1]; ++j) {
        const Ijk a = g.cell(p[i]), c = g.cell(p[j]);
        SL_CHECK(std::abs(a[1] - c[1]) > reach[1] || std::abs(a[2] - c[2]) > reach[2]);
      }
  }
  // Nodes that may read each other keep their path order, so running the batches in turn gives
  // what visiting the path in order gives.
  std::vector<std::size_t> rank(static_cast<std::size_t>(g.size()));
  for (std::size_t i = 0; i < p.size(); ++i) rank[static_cast<std::size_t>(p[i])] = i;
  for (std::size_t i = 0; i < copy_path.size(); ++i)
    for (std::size_t j = i + 1; j < copy_path.size(); ++j) {
      const Ijk a = g.cell(copy_path[i]), c = g.cell(copy_path[j]);
      if (std::abs(a[1] - c[1]) <= reach[1] && std::abs(a[2] - c[2]) <= reach[2])
        SL_CHECK(rank[static_cast<std::size_t>(copy_path[i])] < rank[static_cast<std::size_t>(copy_path[j])]);
    }
}

SL_TEST(one_worker_takes_the_path_in_pieces) {
  SL_CHECK((path_pieces(0, 4) == std::vector<std::int64_t>{0}));
  SL_CHECK((path_pieces(9, 4) == std::vector<std::int64_t>{0, 4, 8, 9}));
  SL_CHECK((path_pieces(8, 4) == std::vector<std::int64_t>{0, 4, 8}));
}

SL_TEST(in_order_runs_give_the_sequential_result) {
  // Position p reads the positions p - 1 and p - 7 (its conflicts): each value depends on the order
  // of everything before it, so any node run before what it reads changes the last value.
  const std::int64_t n = 5000;
  auto reads = [](std::int64_t p, std::int64_t q) { return p - q == 1 || p - q == 7; };
  auto run = [&](int threads) {
    std::vector<std::uint64_t> v(static_cast<std::size_t>(n), 0);
    WorkControl ctl;
    run_in_order(threads, n, reads, [&](int, std::int64_t p) {
      const std::uint64_t a = p >= 1 ? v[static_cast<std::size_t>(p - 1)] : 1, b = p >= 7 ? v[static_cast<std::size_t>(p - 7)] : 3;
      v[static_cast<std::size_t>(p)] = random_bits(a, 0, b, Stream::user) | 1;  // never 0
    }, ctl, nullptr);
    SL_CHECK(ctl.done.load() == n);
    return v;
  };
  const auto one = run(1);
  SL_CHECK(run(2) == one && run(4) == one);
}

SL_TEST(pool_runs_batches_and_cancels) {
  std::vector<std::int64_t> starts{0, 10, 25, 40};
  std::vector<int> hit(40, 0);
  std::atomic<int> after{0};
  WorkControl ctl;
  run_batches(3, starts, [&](int, std::int64_t p) { hit[static_cast<std::size_t>(p)] += 1; },
              [&](std::size_t) { after += 1; }, ctl, Poll{});
  SL_CHECK(std::all_of(hit.begin(), hit.end(), [](int h) { return h == 1; }) && after == 3);
  // One worker: the same work on the calling thread.
  std::fill(hit.begin(), hit.end(), 0);
  after = 0;
  WorkControl one;
  const auto caller = std::this_thread::get_id();
  bool elsewhere = false;
  run_batches(1, starts, [&](int w, std::int64_t p) { hit[static_cast<std::size_t>(p)] += 1 + w; elsewhere |= std::this_thread::get_id() != caller; },
              [&](std::size_t) { after += 1; }, one, Poll{});
  SL_CHECK(std::all_of(hit.begin(), hit.end(), [](int h) { return h == 1; }) && after == 3 && !elsewhere);
  SL_CHECK(one.done.load() == 40);
  // ... and a false poll between its batches cancels it.
  std::vector<std::int64_t> many(201);
  for (std::size_t b = 0; b < many.size(); ++b) many[b] = static_cast<std::int64_t>(b);
  WorkControl one_cancelled;
  int ran = 0;
  SL_CHECK_THROWS(run_batches(1, many, [&](int, std::int64_t) { ++ran; std::this_thread::sleep_for(std::chrono::milliseconds(1)); },
                              [](std::size_t) {}, one_cancelled, [](std::int64_t, std::int64_t) { return false; },
                              std::chrono::milliseconds(5)),
                  Cancelled);
  SL_CHECK(ran < 200 && one_cancelled.cancelled());
  WorkControl ctl2;
  SL_CHECK_THROWS(run_supervised(2, [&](int, int) { while (!ctl2.cancelled()) std::this_thread::yield(); }, ctl2,
                                 [](std::int64_t, std::int64_t) { return false; }, std::chrono::milliseconds(5)),
                  Cancelled);
}

SL_TEST(pool_batches_wait_for_each_other) {
  // Every node sees all earlier batches finished and their after_batch run; after_batch sees its
  // whole batch done. Many short batches, some with a slow node (so that waiting workers both
  // spin and sleep), at 2 workers and at more workers than hardware threads (no spinning).
  std::vector<std::int64_t> starts{0};
  std::mt19937_64 gen(3);
  while (starts.back() < 3000) starts.push_back(starts.back() + 1 + static_cast<std::int64_t>(gen() % 6));
  const std::size_t batches = starts.size() - 1;
  std::vector<std::size_t> batch_of(static_cast<std::size_t>(starts.back()));
  for (std::size_t b = 0; b < batches; ++b)
    for (auto p = starts[b]; p < starts[b + 1]; ++p) batch_of[static_cast<std::size_t>(p)] = b;
  for (int threads : {2, static_cast<int>(std::thread::hardware_concurrency()) + 2}) {
    std::vector<std::atomic<int>> done(batch_of.size());
    std::atomic<std::size_t> finished{0};  // batches whose after_batch has run
    std::atomic<bool> ok{true};
    WorkControl ctl;
    run_batches(
        threads, starts,
        [&](int, std::int64_t p) {
          if (finished.load() != batch_of[static_cast<std::size_t>(p)]) ok = false;
          if (p % 97 == 0) std::this_thread::sleep_for(std::chrono::microseconds(300));
          done[static_cast<std::size_t>(p)] += 1;
        },
        [&](std::size_t b) {
          for (auto p = starts[b]; p < starts[b + 1]; ++p)
            if (done[static_cast<std::size_t>(p)].load() != 1) ok = false;
          finished += 1;
        },
        ctl, Poll{});
    SL_CHECK(ok.load() && finished.load() == batches && ctl.done.load() == starts.back());
  }
}

SL_TEST(pool_rethrows_worker_errors) {
  std::vector<std::int64_t> starts{0, 8, 16};
  for (int threads : {1, 2}) {
    WorkControl ctl;
    SL_CHECK_THROWS(run_batches(threads, starts, [&](int, std::int64_t p) { if (p == 3) throw ParameterError("x", "bad"); },
                                [](std::size_t) {}, ctl, Poll{}),
                    ParameterError);
    SL_CHECK(ctl.cancelled());
    // A run cancelled before it starts runs no node, whatever the threads.
    std::atomic<int> ran{0};
    run_batches(threads, starts, [&](int, std::int64_t) { ++ran; }, [](std::size_t) {}, ctl, Poll{});
    SL_CHECK(ran.load() == 0);
  }
}

SL_TEST(divider_matches_division) {
  // Lemire, Kaser & Kurz 2019: exact below 2**32; above, the division instruction is used.
  std::mt19937_64 gen(5);
  const Index divisors[] = {1, 2, 3, 7, 10, 143, 640, 65535, 65536, 65537, 2147483647, 4294967295LL, 4294967296LL,
                            8589934593LL};
  for (Index d : divisors) {
    const Divider div(d);
    const Index edges[] = {0, 1, d - 1, d, d + 1, 4294967295LL, 4294967296LL, 4294967297LL, Index{1} << 40};
    for (Index n : edges)
      if (n >= 0) SL_CHECK(div.divide(n) == n / d);
    for (int i = 0; i < 20000; ++i) {
      const Index n = static_cast<Index>(gen() >> (i % 2 ? 32 : 23));
      SL_CHECK(div.divide(n) == n / d);
    }
  }
  const Grid g({7, 13, 29});
  for (Index i = 0; i < g.size(); ++i) SL_CHECK(g.index(g.cell(i)) == i);
}
