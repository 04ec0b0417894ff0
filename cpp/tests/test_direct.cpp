// Unit tests of cpp/direct: the block kernels against a scalar loop, the scan rules against a
// brute-force search, determinism across thread counts, and the checks that throw.
#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstring>
#include <limits>
#include <vector>

#include "core/error.hpp"
#include "core/grid.hpp"
#include "core/pool.hpp"
#include "core/random.hpp"
#include "core/template.hpp"
#include "direct/direct_sampler.hpp"
#include "tests/check.hpp"

using namespace sl;
using namespace sl::direct;

namespace {

float unit(std::uint64_t key, std::uint64_t i) { return static_cast<float>(uniform(key, 0, i, Stream::user)); }

// A TI of `shape` with values drawn on `levels` steps in [0, 1] (levels == 0: continuous draws).
std::vector<float> field(const Ijk& shape, std::uint64_t key, int levels) {
  std::vector<float> v(static_cast<std::size_t>(shape[0] * shape[1] * shape[2]));
  for (std::size_t i = 0; i < v.size(); ++i) {
    const float u = unit(key, i);
    v[i] = levels > 0 ? std::floor(u * static_cast<float>(levels)) / static_cast<float>(levels - 1 > 0 ? levels - 1 : 1) : u;
  }
  return v;
}

Params params_for(const Template& t, int neighbors, double accept, double scan, int nvar) {
  Params p;
  p.neighbors = neighbors;
  p.accept_distance = accept;
  p.scan_fraction = scan;
  p.search = t.offsets();
  p.weights.assign(static_cast<std::size_t>(nvar), 1.0);
  return p;
}

// Distance of TI cell `cand` (a real index) for the lags a node at `c` sees, by plain loops; the
// centre lag first when informed, then the template in order, n per variable.
double brute_distance(const Ijk& tshape, const std::vector<std::vector<float>>& ti, const std::vector<Kind>& kinds,
                      const Grid& grid, const std::vector<std::vector<float>>& state, Index c, Index cand,
                      const Template& t, int n) {
  const Ijk at = grid.cell(c);
  const Grid tg(tshape);
  const Ijk tc = tg.cell(cand);
  double num = 0, den = 0;
  for (std::size_t v = 0; v < ti.size(); ++v) {
    std::vector<std::pair<Ijk, float>> lags;
    if (!std::isnan(state[v][static_cast<std::size_t>(c)])) lags.push_back({{0, 0, 0}, state[v][static_cast<std::size_t>(c)]});
    for (const Offset& o : t.offsets()) {
      if (static_cast<int>(lags.size()) >= n) break;
      const Ijk g{at[0] + o[0], at[1] + o[1], at[2] + o[2]};
      if (!grid.contains(g)) continue;
      const float x = state[v][static_cast<std::size_t>(grid.index(g))];
      if (!std::isnan(x)) lags.push_back({{o[0], o[1], o[2]}, x});
    }
    if (lags.empty()) continue;
    double s = 0;
    for (const auto& [o, x] : lags) {
      const Ijk p{tc[0] + o[0], tc[1] + o[1], tc[2] + o[2]};
      double d = 1;
      if (tg.contains(p)) {
        const float y = ti[v][static_cast<std::size_t>(tg.index(p))];
        if (kinds[v] == Kind::categorical)
          d = (y >= 0 && y == x) ? 0 : 1;
        else if (!std::isnan(y))
          d = std::min(1.0, double(y - x) * double(y - x));
      }
      s += d;
    }
    s /= static_cast<double>(lags.size());
    num += kinds[v] == Kind::categorical ? s : std::sqrt(s);
    den += 1;
  }
  return den > 0 ? num / den : 0;
}

}  // namespace

// Lags of a LagSet for a block in scan phase `phase`: the slot offsets the kernel reads.
static void set_phase(const TrainingImage& ti, sl::direct::detail::LagSet& l, const std::vector<Offset>& lags,
                      std::int64_t phase) {
  l.delta.clear();
  for (const Offset& o : lags) {
    const std::int64_t d = ti.padded_delta(o), s = ti.stride();
    const std::int64_t q = d >= 0 ? d / s : -((-d + s - 1) / s);
    l.delta.push_back(ti.phase_delta(q, d - q * s, phase));
  }
}

SL_TEST(direct_block_kernel_matches_a_scalar_loop) {
  const Ijk shape{3, 9, 40};
  const auto a = field(shape, 11, 0);
  auto b = field(shape, 12, 3);
  for (auto& x : b) x = std::floor(x * 2.99f);  // category codes 0..2
  b[5] = -1;                                     // a masked category
  const Offset reach{1, 2, 3};
  const TrainingImage ti(shape, {a.data(), b.data()}, {Kind::continuous, Kind::categorical}, reach);
  SL_CHECK(ti.stride() == 7);
  const auto t = Template::box({1, 2, 3});
  std::vector<Offset> lags;
  sl::direct::detail::LagSet lc, lk;
  for (std::size_t k = 0; k < 21; ++k) {
    lags.push_back(t.offsets()[k * 3]);
    for (auto* l : {&lc, &lk}) {
      l->weight.push_back(0.5f + unit(97, k));
      l->weight_sum += l->weight.back();
    }
    lc.value.push_back(unit(98, k));
    lk.value.push_back(std::floor(unit(99, k) * 2.99f));
  }
  lc.size = 21;
  lk.size = 13;
  lk.weight_sum = 0;
  for (int k = 0; k < 13; ++k) lk.weight_sum += lk.weight[static_cast<std::size_t>(k)];
  sl::direct::detail::NodeView view;
  view.informed = ti.informed();
  view.need = 3;
  view.count = 2;
  view.data = {ti.data(0), ti.data(1)};
  view.lags = {&lc, &lk};
  view.share = {0.25f, 0.75f};
  view.inv_share = {4.0f, 1.0f / 0.75f};
  view.sum = {static_cast<float>(lc.weight_sum), static_cast<float>(lk.weight_sum)};
  view.categorical = {false, true};
  int real_lanes = 0;
  for (const Index cell : {Index{0}, Index{41}, Index{3 * 9 * 40 - 1}, Index{200}}) {
    const std::int64_t e = ti.slot(ti.padded_index(cell));
    SL_CHECK(ti.real_index(e) == cell);
    const std::int64_t phase = e / ti.phase_length();
    set_phase(ti, lc, lags, phase);
    set_phase(ti, lk, lags, phase);
    const int lanes = static_cast<int>(std::min<std::int64_t>(11, ti.phase_length() - e % ti.phase_length()));
    float out[kLanes];
    std::int64_t comparisons = 0;
    SL_CHECK(sl::direct::detail::evaluate_block(view, e, lanes, std::numeric_limits<float>::infinity(), out, comparisons));
    SL_CHECK(comparisons == lanes * (21 + 13));
    double lowest = 2;
    for (int j = 0; j < kLanes; ++j) {
      const Index real = j < lanes ? ti.real_index(e + j) : -1;
      const bool masked = real < 0 || (ti.informed()[e + j] & 3u) != 3u;
      if (masked) {
        SL_CHECK(std::isinf(out[j]));
        continue;
      }
      ++real_lanes;
      // Lane j is the padded position of slot e + j; its lags are read at position + offset.
      const std::int64_t p = ti.position(e + j);
      SL_CHECK(p == ti.padded_index(real));
      double sc = 0, sk = 0;
      for (int k = 0; k < 21; ++k) {
        const float x = ti.value_at(0, p + ti.padded_delta(lags[static_cast<std::size_t>(k)]));
        const double d = double(x) - lc.value[static_cast<std::size_t>(k)];
        sc += lc.weight[static_cast<std::size_t>(k)] * std::min(1.0, d * d);  // outside cells hold 1e4: d*d > 1
      }
      for (int k = 0; k < 13; ++k) {
        const float x = ti.value_at(1, p + ti.padded_delta(lags[static_cast<std::size_t>(k)]));
        sk += lk.weight[static_cast<std::size_t>(k)] * (x != lk.value[static_cast<std::size_t>(k)] ? 1.0 : 0.0);
      }
      const double expect = 0.25 * std::sqrt(sc / lc.weight_sum) + 0.75 * sk / lk.weight_sum;
      SL_CHECK(std::abs(out[j] - expect) < 1e-5);
      lowest = std::min(lowest, expect);
    }
    // A best below every lane's distance abandons the block, one just above it does not.
    comparisons = 0;
    SL_CHECK(!sl::direct::detail::evaluate_block(view, e, lanes, static_cast<float>(lowest) * 0.5f, out, comparisons));
    SL_CHECK(comparisons < lanes * (21 + 13));
    SL_CHECK(sl::direct::detail::evaluate_block(view, e, lanes, static_cast<float>(lowest) * 1.01f + 1e-6f, out, comparisons));
  }
  SL_CHECK(real_lanes >= 20);
}

SL_TEST(direct_byte_kernel_equals_the_float_kernel) {
  // Two categorical variables, lags weighing 1: evaluate_wide must give evaluate_block's floats bit
  // for bit, lane by lane, and abandon a block only when no lane beats `best`.
  const Ijk shape{2, 11, 53};
  auto a = field(shape, 21, 0), b = field(shape, 22, 0);
  for (auto& x : a) x = std::floor(x * 3.99f);  // codes 0..3
  for (auto& x : b) x = std::floor(x * 1.99f);  // codes 0..1
  a[7] = -1;
  b[100] = -1;
  b[101] = std::numeric_limits<float>::quiet_NaN();
  const Offset reach{1, 3, 3};
  const TrainingImage ti(shape, {a.data(), b.data()}, {Kind::categorical, Kind::categorical}, reach);
  SL_CHECK(ti.codes(0) != nullptr && ti.codes(1) != nullptr);
  const auto t = Template::box({1, 3, 3});
  std::vector<Offset> lags;
  sl::direct::detail::LagSet la, lb;
  const float node_a[] = {0, 1, 2, 3, 7, 300, -1};  // 7 and 300: in no TI cell; -1: equals the masked sentinel
  for (std::size_t k = 0; k < 40; ++k) {
    lags.push_back(t.offsets()[(k * 5) % t.size()]);
    la.value.push_back(node_a[static_cast<std::size_t>(unit(31, k) * 6.99f)]);
    lb.value.push_back(std::floor(unit(32, k) * 1.99f));
  }
  for (auto* l : {&la, &lb}) {
    l->weight.assign(40, 1.0f);
    l->code.resize(40);
  }
  la.size = 40;
  lb.size = 17;
  la.weight_sum = 40;
  lb.weight_sum = 17;
  for (std::size_t k = 0; k < 40; ++k) {
    const float x = la.value[k];
    la.code[k] = x == kMaskedCategory ? kMaskedByte : x <= float(kMaxByteCode) ? static_cast<std::uint8_t>(x) : kForeignByte;
    lb.code[k] = static_cast<std::uint8_t>(lb.value[k]);
  }
  sl::direct::detail::NodeView view;
  view.informed = ti.informed();
  view.need = 3;
  view.count = 2;
  view.data = {ti.data(0), ti.data(1)};
  view.codes = {ti.codes(0), ti.codes(1)};
  view.bytes = true;
  view.lags = {&la, &lb};
  view.share = {1.0f / 3.0f, 2.0f / 3.0f};
  view.inv_share = {3.0f, 1.5f};
  view.sum = {40.0f, 17.0f};
  view.categorical = {true, true};
  const std::int64_t K = ti.phase_length();
  int compared = 0, abandoned = 0;
  for (std::int64_t e = 0; e < ti.stride() * K; e += 29) {
    const std::int64_t phase = e / K;
    set_phase(ti, la, lags, phase);
    set_phase(ti, lb, lags, phase);
    const int lanes = static_cast<int>(std::min<std::int64_t>(kWideLanes, K - e % K));
    float wide[kWideLanes], block[kWideLanes];
    std::int64_t cw = 0, cb = 0;
    SL_CHECK(sl::direct::detail::evaluate_wide(view, e, lanes, std::numeric_limits<float>::infinity(), wide, cw));
    float lowest = std::numeric_limits<float>::infinity();
    for (int g = 0; g < kWideLanes; g += kLanes) {
      const int n = std::clamp(lanes - g, 0, kLanes);
      if (n == 0) break;
      SL_CHECK(sl::direct::detail::evaluate_block(view, e + g, n, std::numeric_limits<float>::infinity(), block + g, cb));
      for (int j = g; j < g + n; ++j) {
        SL_CHECK(std::memcmp(&wide[j], &block[j], sizeof(float)) == 0);  // bit for bit, +inf included
        lowest = std::min(lowest, wide[j]);
        ++compared;
      }
    }
    SL_CHECK(cw == cb);
    if (!(lowest < std::numeric_limits<float>::infinity()) || lowest <= 0) continue;
    // Best at the lowest distance: none can beat it, so the block may be abandoned; either way no
    // lane that is returned may differ. Just above it, the block must be evaluated.
    float out[kWideLanes];
    if (!sl::direct::detail::evaluate_wide(view, e, lanes, lowest, out, cw)) ++abandoned;
    SL_CHECK(sl::direct::detail::evaluate_wide(view, e, lanes, std::nextafter(lowest, 2.0f), out, cw));
    for (int j = 0; j < lanes; ++j) SL_CHECK(std::memcmp(&out[j], &wide[j], sizeof(float)) == 0);
    if (!sl::direct::detail::evaluate_wide(view, e, lanes, lowest * 0.5f, out, cw)) ++abandoned;
  }
  SL_CHECK(compared >= 1000);
  SL_CHECK(abandoned >= 10);
  // Weighted lags: evaluate_block reads the byte codes when given them, with the same float sums.
  for (auto* l : {&la, &lb}) {
    l->weight_sum = 0;
    for (int k = 0; k < l->size; ++k) {
      l->weight[static_cast<std::size_t>(k)] = 0.3f + unit(33, static_cast<std::uint64_t>(k));
      l->weight_sum += l->weight[static_cast<std::size_t>(k)];
    }
  }
  view.sum = {static_cast<float>(la.weight_sum), static_cast<float>(lb.weight_sum)};
  sl::direct::detail::NodeView floats = view;
  floats.codes = {};
  floats.bytes = false;
  int weighted = 0;
  for (std::int64_t e = 0; e < ti.stride() * K; e += 5) {
    set_phase(ti, la, lags, e / K);
    set_phase(ti, lb, lags, e / K);
    const int lanes = static_cast<int>(std::min<std::int64_t>(kLanes, K - e % K));
    float x[kLanes], y[kLanes];
    std::int64_t cx = 0, cy = 0;
    SL_CHECK(sl::direct::detail::evaluate_block(view, e, lanes, std::numeric_limits<float>::infinity(), x, cx));
    SL_CHECK(sl::direct::detail::evaluate_block(floats, e, lanes, std::numeric_limits<float>::infinity(), y, cy));
    SL_CHECK(std::memcmp(x, y, sizeof(float) * static_cast<std::size_t>(lanes)) == 0 && cx == cy);
    for (int j = 0; j < lanes; ++j) weighted += x[j] < std::numeric_limits<float>::infinity() ? 1 : 0;
  }
  SL_CHECK(weighted >= 400);
  // screen_wide bounds the weighted distances from below, and gives up on a block only when every
  // lane is above `best`; the bound is within 1 % of the distance here (30-odd weighted lags).
  for (auto* l : {&la, &lb}) {
    const double unit = l->weight_sum / 32767.0;
    l->iweight.resize(40);
    for (int k = 0; k < l->size; ++k)
      l->iweight[static_cast<std::size_t>(k)] =
          static_cast<std::int16_t>(std::floor(static_cast<double>(l->weight[static_cast<std::size_t>(k)]) / unit));
    l->unit = std::nextafter(static_cast<float>(unit), 0.0f);
  }
  int bounded = 0, screened_out = 0;
  for (std::int64_t e = 0; e < ti.stride() * K; e += 23) {
    set_phase(ti, la, lags, e / K);
    set_phase(ti, lb, lags, e / K);
    const int lanes = static_cast<int>(std::min<std::int64_t>(kWideLanes, K - e % K));
    float bound[kWideLanes], exact[kWideLanes];
    std::int64_t c = 0;
    SL_CHECK(sl::direct::detail::screen_wide(view, e, lanes, std::numeric_limits<float>::infinity(), bound, c));
    float lowest = std::numeric_limits<float>::infinity();
    for (int g = 0; g < lanes; g += kLanes) {
      const int n = std::min(kLanes, lanes - g);
      SL_CHECK(sl::direct::detail::evaluate_block(floats, e + g, n, std::numeric_limits<float>::infinity(), exact + g, c));
      for (int j = g; j < g + n; ++j) {
        SL_CHECK(std::isinf(bound[j]) == std::isinf(exact[j]));
        if (std::isinf(exact[j])) continue;
        SL_CHECK(bound[j] <= exact[j] && bound[j] >= 0.99f * exact[j]);
        lowest = std::min(lowest, exact[j]);
        ++bounded;
      }
    }
    if (std::isinf(lowest)) continue;
    SL_CHECK(sl::direct::detail::screen_wide(view, e, lanes, std::nextafter(lowest, 2.0f), bound, c));
    if (!sl::direct::detail::screen_wide(view, e, lanes, 0.9f * lowest, bound, c)) ++screened_out;
  }
  SL_CHECK(bounded >= 1000);
  SL_CHECK(screened_out >= 10);
  // A code above a byte leaves the variable to the float kernel.
  std::vector<float> c(a);
  c[3] = 300;
  const TrainingImage wide_codes(shape, {c.data()}, {Kind::categorical}, reach);
  SL_CHECK(wide_codes.codes(0) == nullptr);
}

SL_TEST(direct_padding_marks_outside_cells_as_masked) {
  const Ijk shape{1, 4, 5};
  std::vector<float> a(20, 0.25f);
  a[7] = std::numeric_limits<float>::quiet_NaN();
  const TrainingImage ti(shape, {a.data()}, {Kind::continuous}, {0, 2, 2});
  SL_CHECK(ti.count_informed(1) == 19);
  SL_CHECK(ti.value_at(0, ti.padded_index(0)) == 0.25f);
  SL_CHECK(ti.value_at(0, ti.padded_index(0) + ti.padded_delta({0, 0, -1})) == kMaskedContinuous);
  SL_CHECK(ti.value_at(0, ti.padded_index(7)) == kMaskedContinuous);
  SL_CHECK((ti.informed()[ti.slot(ti.padded_index(7))] & 1u) == 0);
  // every real cell has one slot, and the slots visit the cells at the stride (5 = 2 * 2 + 1)
  SL_CHECK(ti.stride() == 5 && ti.real_before()[ti.stride() * ti.phase_length()] == 20);
  SL_CHECK(ti.position(ti.slot(ti.padded_index(3)) + 1) == ti.padded_index(3) + 5);
}

// Isolated unknown nodes (farther apart than the search reach) see only hard data, so each one's
// copy is fixed by the scan rules alone: with scan_fraction 1 and accept 0 it is the first best
// candidate from the node's start.
SL_TEST(direct_scan_takes_the_first_best_candidate) {
  const Ijk tshape{1, 14, 17};
  std::vector<std::vector<float>> ti{field(tshape, 5, 3), field(tshape, 6, 4)};
  for (auto& x : ti[1]) x = std::floor(x * 3.0f);  // categories 0..2
  ti[0][30] = std::numeric_limits<float>::quiet_NaN();
  ti[1][31] = -1;
  const std::vector<Kind> kinds{Kind::continuous, Kind::categorical};
  const auto t = Template::ellipsoid({0, 2.5, 2.5}, 0);
  const TrainingImage img(tshape, {ti[0].data(), ti[1].data()}, kinds, t.reach());
  const Grid grid({1, 18, 18});
  std::vector<std::vector<float>> state{field(grid.shape(), 7, 3), field(grid.shape(), 8, 4)};
  for (auto& x : state[1]) x = std::floor(x * 3.0f);
  const float nan = std::numeric_limits<float>::quiet_NaN();
  std::vector<Index> unknown;
  for (Index y = 1; y < 18; y += 6)
    for (Index x = 2; x < 18; x += 6) unknown.push_back(grid.index({0, y, x}));
  for (std::size_t i = 0; i < unknown.size(); ++i) {
    state[0][static_cast<std::size_t>(unknown[i])] = nan;
    if (i % 2) state[1][static_cast<std::size_t>(unknown[i])] = nan;  // partly informed nodes on even i
  }
  const auto before = state;
  for (const double accept : {0.0, 0.3}) {
    auto work = before;
    std::vector<float*> ptrs{work[0].data(), work[1].data()};
    std::vector<std::int64_t> source(static_cast<std::size_t>(grid.size()));
    WorkControl ctl;
    const Params p = params_for(t, 6, accept, 1.0, 2);
    const Stats st = simulate(img, grid, ptrs, {false, false}, p, source.data(), ctl, Poll{});
    SL_CHECK(st.nodes == static_cast<std::int64_t>(unknown.size()));
    for (std::size_t i = 0; i < unknown.size(); ++i) {
      const Index c = unknown[i];
      const Index n = 14 * 17;
      // Scan order: the real cells by slot (strided order), from the node's start cell on.
      std::vector<Index> order(static_cast<std::size_t>(n));
      for (Index i = 0; i < n; ++i) order[static_cast<std::size_t>(i)] = i;
      std::sort(order.begin(), order.end(), [&](Index u, Index v) {
        return img.slot(img.padded_index(u)) < img.slot(img.padded_index(v));
      });
      const Index first = sl::direct::detail::scan_start(0, c, n);
      const auto at = std::find(order.begin(), order.end(), first) - order.begin();
      Index expect = -1;
      double best = 2;
      for (Index s = 0; s < n; ++s) {
        const Index q = order[static_cast<std::size_t>((at + s) % n)];
        const bool need_cat = i % 2 == 1;
        if (std::isnan(ti[0][static_cast<std::size_t>(q)]) || (need_cat && ti[1][static_cast<std::size_t>(q)] < 0)) continue;
        const double d = brute_distance(tshape, ti, kinds, grid, before, c, q, t, 6);
        if (d <= accept + 1e-6) {
          expect = q;
          break;
        }
        if (d < best - 1e-6) {
          best = d;
          expect = q;
        }
      }
      SL_CHECK(source[static_cast<std::size_t>(c)] == expect);
      SL_CHECK(work[0][static_cast<std::size_t>(c)] == ti[0][static_cast<std::size_t>(expect)]);
    }
    for (Index c = 0; c < grid.size(); ++c)
      if (std::find(unknown.begin(), unknown.end(), c) == unknown.end()) SL_CHECK(source[static_cast<std::size_t>(c)] == -1);
  }
}

SL_TEST(direct_result_is_the_same_for_any_thread_count) {
  const Ijk tshape{4, 20, 24};
  const auto a = field(tshape, 21, 0);
  const auto t = Template::ellipsoid({1.5, 3, 3}, 0);
  const TrainingImage img(tshape, {a.data()}, {Kind::continuous}, t.reach());
  const Grid grid({5, 30, 30});
  std::vector<std::vector<std::int64_t>> sources;
  for (int threads : {1, 2, 3}) {
    std::vector<float> s(static_cast<std::size_t>(grid.size()), std::numeric_limits<float>::quiet_NaN());
    std::vector<float*> ptrs{s.data()};
    std::vector<std::int64_t> source(s.size());
    WorkControl ctl;
    Params p = params_for(t, 12, 0.05, 0.2, 1);
    p.seed = 42;
    p.threads = threads;
    simulate(img, grid, ptrs, {false}, p, source.data(), ctl, Poll{});
    for (auto x : source) SL_CHECK(x >= 0 && x < img.size());
    sources.push_back(source);
  }
  SL_CHECK(sources[0] == sources[1] && sources[1] == sources[2]);
}

SL_TEST(direct_checks_throw_parameter_errors) {
  const Ijk tshape{1, 5, 5};
  const auto a = field(tshape, 1, 0);
  const auto t = Template::ellipsoid({0, 2, 2}, 0);
  const TrainingImage img(tshape, {a.data()}, {Kind::continuous}, t.reach());
  const Grid grid({1, 6, 6});
  std::vector<float> s(36, std::numeric_limits<float>::quiet_NaN());
  std::vector<float*> ptrs{s.data()};
  std::vector<std::int64_t> source(36);
  WorkControl ctl;
  Params p = params_for(t, 4, 0.1, 0.5, 1);
  p.weights = {0.0};
  SL_CHECK_THROWS(simulate(img, grid, ptrs, {false}, p, source.data(), ctl, Poll{}), ParameterError);
  p.weights = {1.0};
  p.scan_fraction = 0;
  SL_CHECK_THROWS(simulate(img, grid, ptrs, {false}, p, source.data(), ctl, Poll{}), ParameterError);
  p.scan_fraction = 0.5;
  p.neighbors = 0;
  SL_CHECK_THROWS(simulate(img, grid, ptrs, {false}, p, source.data(), ctl, Poll{}), ParameterError);
  p.neighbors = 4;
  SL_CHECK_THROWS(simulate(img, grid, ptrs, {true}, p, source.data(), ctl, Poll{}), ParameterError);  // nothing left
  p.search = Template::ellipsoid({0, 4, 4}, 0).offsets();  // beyond the padding
  SL_CHECK_THROWS(simulate(img, grid, ptrs, {false}, p, source.data(), ctl, Poll{}), ParameterError);
  std::vector<float> masked(25, std::numeric_limits<float>::quiet_NaN());
  const TrainingImage empty(tshape, {masked.data()}, {Kind::continuous}, t.reach());
  p.search = t.offsets();
  SL_CHECK_THROWS(simulate(empty, grid, ptrs, {false}, p, source.data(), ctl, Poll{}), ParameterError);
}

SL_TEST(direct_cancel_stops_the_run) {
  const Ijk tshape{8, 40, 40};
  const auto a = field(tshape, 2, 0);
  const auto t = Template::ellipsoid({2, 4, 4}, 0);
  const TrainingImage img(tshape, {a.data()}, {Kind::continuous}, t.reach());
  const Grid grid({20, 60, 60});
  std::vector<float> s(static_cast<std::size_t>(grid.size()), std::numeric_limits<float>::quiet_NaN());
  std::vector<float*> ptrs{s.data()};
  std::vector<std::int64_t> source(s.size());
  for (const PathKind path : {PathKind::random, PathKind::sweep}) {
    WorkControl ctl;
    Params p = params_for(t, 30, 0.0, 1.0, 1);
    p.path = path;
    p.threads = 2;
    int calls = 0;
    SL_CHECK_THROWS(simulate(img, grid, ptrs, {false}, p, source.data(), ctl,
                             [&](std::int64_t, std::int64_t) { return ++calls < 2; }),
                    Cancelled);
  }
}

// Zones and local geometry: an identity matrix and one zone reproduce the plain run; two zones with
// the same image give the same result as one; a turned lag beyond the padding is refused.
SL_TEST(direct_zones_and_geometry_reduce_to_the_plain_run) {
  const Ijk tshape{1, 30, 30};
  const auto a = field(tshape, 3, 0);
  const auto t = Template::ellipsoid({0, 3, 3}, 0);
  const TrainingImage img(tshape, {a.data()}, {Kind::continuous}, t.reach());
  const Grid grid({1, 24, 24});
  const auto cells = static_cast<std::size_t>(grid.size());
  Params p = params_for(t, 8, 0.05, 0.5, 1);
  p.seed = 2;
  auto run = [&](const std::vector<const TrainingImage*>& tis, const std::vector<Params>& ps, const std::int32_t* zone,
                 const sl::direct::Geometry& geo) {
    std::vector<float> s(cells, std::numeric_limits<float>::quiet_NaN());
    s[17] = 0.5f;
    std::vector<float*> ptrs{s.data()};
    std::vector<std::int64_t> source(cells);
    WorkControl ctl;
    sl::direct::simulate_zones(tis, ps, zone, geo, grid, ptrs, {false}, source.data(), ctl, Poll{});
    return source;
  };
  std::vector<float> s(cells, std::numeric_limits<float>::quiet_NaN());
  s[17] = 0.5f;
  std::vector<float*> ptrs{s.data()};
  std::vector<std::int64_t> plain(cells);
  WorkControl ctl;
  simulate(img, grid, ptrs, {false}, p, plain.data(), ctl, Poll{});
  sl::direct::Geometry identity;
  identity.matrices = {1, 0, 0, 0, 1, 0, 0, 0, 1};
  std::vector<std::int32_t> cls(cells, 0);
  identity.cls = cls.data();
  SL_CHECK(run({&img}, {p}, nullptr, identity) == plain);
  std::vector<std::int32_t> zone(cells, 0);
  for (std::size_t i = cells / 2; i < cells; ++i) zone[i] = 1;
  SL_CHECK(run({&img, &img}, {p, p}, zone.data(), sl::direct::Geometry{}) == plain);
  sl::direct::Geometry wide;
  wide.matrices = {1, 0, 0, 0, 4, 0, 0, 0, 4};  // lags four times longer than the padding allows
  wide.cls = cls.data();
  SL_CHECK_THROWS(run({&img}, {p}, nullptr, wide), ParameterError);
  zone[3] = 2;  // a zone without a training image
  SL_CHECK_THROWS(run({&img, &img}, {p, p}, zone.data(), sl::direct::Geometry{}), ParameterError);
}
