// Python bindings of the core: the only file that includes pybind11. Arrays arrive checked by the
// Python layer; anything the core still rejects throws a C++ exception that is translated here into
// ValueError / TypeError / MemoryError / KeyboardInterrupt.
#include <pybind11/functional.h>
#include <pybind11/numpy.h>
#include <pybind11/pybind11.h>
#include <pybind11/stl.h>

#include <chrono>
#include <cstdint>
#include <string>
#include <vector>

#include "core/error.hpp"
#include "core/grid.hpp"
#include "core/path.hpp"
#include "core/pool.hpp"
#include "core/random.hpp"
#include "core/template.hpp"
#include "merge/tau.hpp"
#include "tree/pattern_tree.hpp"
#include "tree/tree_sim.hpp"
#include "direct/direct_sampler.hpp"

namespace py = pybind11;
using sl::Index;

#ifndef STRATALOOM_VERSION
#define STRATALOOM_VERSION "0+unknown"
#endif

namespace {

template <class T>
using CArray = py::array_t<T, py::array::c_style | py::array::forcecast>;

// A poll for sl::run_supervised: checks Ctrl-C and calls the progress callback, with the GIL.
// Holds a pointer so that copying the std::function never touches Python reference counts.
sl::Poll make_poll(const py::object* progress) {
  return [progress](std::int64_t done, std::int64_t total) -> bool {
    py::gil_scoped_acquire gil;
    if (PyErr_CheckSignals() != 0) throw py::error_already_set();
    if (progress && !progress->is_none()) (*progress)(done, total);
    return true;
  };
}

sl::Ijk to_ijk(const std::array<Index, 3>& a) { return {a[0], a[1], a[2]}; }

std::vector<sl::Offset> offsets_from(const CArray<std::int64_t>& a, const char* name) {
  if (a.ndim() != 2 || a.shape(1) != 3)
    throw sl::ParameterError(name, "must be an (n, 3) integer array of (dz, dy, dx) offsets.");
  std::vector<sl::Offset> out(static_cast<std::size_t>(a.shape(0)));
  auto r = a.unchecked<2>();
  for (py::ssize_t i = 0; i < a.shape(0); ++i)
    for (int k = 0; k < 3; ++k) {
      const std::int64_t v = r(i, k);
      if (v < -(1 << 24) || v > (1 << 24)) throw sl::ParameterError(name, "must hold offsets of at most 2**24 cells.");
      out[static_cast<std::size_t>(i)][k] = static_cast<std::int32_t>(v);
    }
  return out;
}

py::array_t<std::int64_t> offsets_to_array(const std::vector<sl::Offset>& offsets) {
  py::array_t<std::int64_t> out({static_cast<py::ssize_t>(offsets.size()), py::ssize_t{3}});
  auto w = out.mutable_unchecked<2>();
  for (std::size_t i = 0; i < offsets.size(); ++i)
    for (int k = 0; k < 3; ++k) w(static_cast<py::ssize_t>(i), k) = offsets[i][k];
  return out;
}

template <class T>
py::array_t<T> vector_to_array(std::vector<T>&& v) {
  auto* heap = new std::vector<T>(std::move(v));
  py::capsule owner(heap, [](void* p) { delete static_cast<std::vector<T>*>(p); });
  return py::array_t<T>({static_cast<py::ssize_t>(heap->size())}, {sizeof(T)}, heap->data(), owner);
}

void bind_core(py::module_& m) {
  py::class_<sl::Grid>(m, "Grid")
      .def(py::init([](std::array<Index, 3> shape, std::array<double, 3> spacing, std::array<double, 3> origin) {
             return sl::Grid(to_ijk(shape), spacing, origin);
           }),
           py::arg("shape"), py::arg("spacing"), py::arg("origin"))
      .def_property_readonly("shape", &sl::Grid::shape)
      .def_property_readonly("spacing", &sl::Grid::spacing)
      .def_property_readonly("origin", &sl::Grid::origin)
      .def_property_readonly("size", &sl::Grid::size)
      .def("level_extent", [](const sl::Grid& g, int level) {
        sl::require_level(level);
        return std::array<Index, 3>{g.level_extent(level, 0), g.level_extent(level, 1), g.level_extent(level, 2)};
      })
      .def("index", [](const sl::Grid& g, const CArray<std::int64_t>& cells) {
        if (cells.ndim() != 2 || cells.shape(1) != 3) throw sl::ParameterError("cells", "must be an (n, 3) integer array.");
        py::array_t<std::int64_t> out(cells.shape(0));
        auto r = cells.unchecked<2>();
        auto w = out.mutable_unchecked<1>();
        for (py::ssize_t i = 0; i < cells.shape(0); ++i) {
          const sl::Ijk c{r(i, 0), r(i, 1), r(i, 2)};
          if (!g.contains(c))
            throw sl::ParameterError("cells", "holds cell (" + std::to_string(c[0]) + ", " + std::to_string(c[1]) + ", " +
                                                  std::to_string(c[2]) + ") outside the grid.");
          w(i) = g.index(c);
        }
        return out;
      })
      .def("cell", [](const sl::Grid& g, const CArray<std::int64_t>& index) {
        py::array_t<std::int64_t> out({index.size(), py::ssize_t{3}});
        const std::int64_t* r = index.data();
        auto w = out.mutable_unchecked<2>();
        for (py::ssize_t i = 0; i < index.size(); ++i) {
          if (r[i] < 0 || r[i] >= g.size())
            throw sl::ParameterError("index", "holds " + std::to_string(r[i]) + ", outside [0, " + std::to_string(g.size()) + ").");
          const sl::Ijk c = g.cell(r[i]);
          for (int k = 0; k < 3; ++k) w(i, k) = c[k];
        }
        return out;
      })
      .def("centre", [](const sl::Grid& g, const CArray<std::int64_t>& cells) {
        if (cells.ndim() != 2 || cells.shape(1) != 3) throw sl::ParameterError("cells", "must be an (n, 3) integer array.");
        py::array_t<double> out({cells.shape(0), py::ssize_t{3}});
        auto r = cells.unchecked<2>();
        auto w = out.mutable_unchecked<2>();
        for (py::ssize_t i = 0; i < cells.shape(0); ++i) {
          const sl::Xyz p = g.centre({r(i, 0), r(i, 1), r(i, 2)});
          for (int k = 0; k < 3; ++k) w(i, k) = p[k];
        }
        return out;
      })
      .def("locate", [](const sl::Grid& g, const CArray<double>& points) {
        if (points.ndim() != 2 || points.shape(1) != 3) throw sl::ParameterError("points", "must be an (n, 3) float array.");
        py::array_t<std::int64_t> out({points.shape(0), py::ssize_t{3}});
        auto r = points.unchecked<2>();
        auto w = out.mutable_unchecked<2>();
        for (py::ssize_t i = 0; i < points.shape(0); ++i) {
          sl::Ijk c{-1, -1, -1};
          if (!g.locate({r(i, 0), r(i, 1), r(i, 2)}, c)) c = {-1, -1, -1};
          for (int k = 0; k < 3; ++k) w(i, k) = c[k];
        }
        return out;
      });

  m.def("template_box", [](std::array<std::int32_t, 3> radius) { return offsets_to_array(sl::Template::box(radius).offsets()); },
        py::arg("radius"));
  m.def("template_ellipsoid",
        [](std::array<double, 3> radius, std::int64_t max_nodes) {
          return offsets_to_array(sl::Template::ellipsoid(radius, max_nodes).offsets());
        },
        py::arg("radius"), py::arg("max_nodes"));
  m.def("template_check", [](const CArray<std::int64_t>& offsets) {
        return offsets_to_array(sl::Template(offsets_from(offsets, "offsets")).offsets());
      },
      py::arg("offsets"));
  m.def("template_sort", [](const CArray<std::int64_t>& offsets, std::array<double, 3> radius) {
        auto o = offsets_from(offsets, "offsets");
        sl::sort_by_anisotropic_distance(o, radius);
        return offsets_to_array(o);
      },
      py::arg("offsets"), py::arg("radius"));

  m.def("uniform", [](std::uint64_t seed, std::uint32_t level, const CArray<std::int64_t>& cells, std::uint32_t stream) {
        py::array_t<double> out(cells.size());
        const std::int64_t* c = cells.data();
        double* w = out.mutable_data();
        {
          py::gil_scoped_release release;
          for (py::ssize_t i = 0; i < cells.size(); ++i) w[i] = sl::to_unit(sl::random_bits(seed, level, static_cast<std::uint64_t>(c[i]), stream));
        }
        return out;
      },
      py::arg("seed"), py::arg("level"), py::arg("cells"), py::arg("stream"));

  m.def("level_cells", [](const sl::Grid& g, int level, int coarsest) { return vector_to_array(sl::level_cells(g, level, coarsest)); },
        py::arg("grid"), py::arg("level"), py::arg("coarsest"));
  m.def("random_path",
        [](const sl::Grid& g, int level, int coarsest, std::uint64_t seed) {
          auto cells = sl::level_cells(g, level, coarsest);
          sl::shuffle_path(cells, seed, level);
          return vector_to_array(std::move(cells));
        },
        py::arg("grid"), py::arg("level"), py::arg("coarsest"), py::arg("seed"));
  m.def("conflict_free_batches",
        [](const sl::Grid& g, int level, std::array<std::int32_t, 3> reach, const CArray<std::int64_t>& path, std::int64_t max_batch) {
          std::vector<Index> p(path.data(), path.data() + path.size());
          for (Index c : p)
            if (c < 0 || c >= g.size()) throw sl::ParameterError("path", "holds a cell index outside the grid.");
          auto starts = sl::conflict_free_batches(g, level, {reach[0], reach[1], reach[2]}, p, max_batch);
          return py::make_tuple(vector_to_array(std::move(p)), vector_to_array(std::move(starts)));
        },
        py::arg("grid"), py::arg("level"), py::arg("reach"), py::arg("path"), py::arg("max_batch"));

  // Diagnostic used by the test-suite: keeps `threads` workers busy for `seconds`, reporting
  // progress, so that cancellation and progress can be checked without an engine.
  m.def("pool_selftest",
        [](double seconds, int threads, const py::object& progress) {
          sl::WorkControl ctl;
          ctl.total = 1000;
          const sl::Poll poll = make_poll(&progress);
          int used = 0;
          {
            py::gil_scoped_release release;
            const auto t0 = std::chrono::steady_clock::now();
            used = sl::resolve_threads(threads);
            sl::run_supervised(
                threads,
                [&](int worker, int) {
                  while (!ctl.cancelled()) {
                    const double el = std::chrono::duration<double>(std::chrono::steady_clock::now() - t0).count();
                    if (el >= seconds) break;
                    if (worker == 0) ctl.done.store(static_cast<std::int64_t>(1000 * el / seconds));
                    std::this_thread::sleep_for(std::chrono::milliseconds(2));
                  }
                  if (worker == 0) ctl.done.store(1000);
                },
                ctl, poll);
          }
          return used;
        },
        py::arg("seconds"), py::arg("threads"), py::arg("progress") = py::none());
}

// Pattern-tree engine. The Python layer has checked dtypes and shapes; the core checks the rest.
void bind_tree(py::module_& m) {
  m.def("default_memory_limit", &sl::default_memory_limit);
  m.def("tau_merge",
        [](const CArray<double>& prior, const CArray<double>& sources, const CArray<double>& tau) {
          if (prior.ndim() != 1 || sources.ndim() != 2 || sources.shape(1) != prior.shape(0) || tau.ndim() != 1 ||
              tau.shape(0) != sources.shape(0))
            throw sl::ParameterError("sources", "must be an (s, K) array with K = len(prior) and s = len(tau).");
          py::array_t<double> out(prior.shape(0));
          sl::tau_merge(prior.data(), sources.data(), tau.data(), static_cast<std::size_t>(sources.shape(0)),
                        static_cast<std::size_t>(prior.shape(0)), out.mutable_data());
          return out;
        },
        py::arg("prior"), py::arg("sources"), py::arg("tau"));

  py::class_<sl::PatternTree>(m, "PatternTree")
      .def(py::init([](const CArray<std::uint8_t>& codes, int categories, const CArray<std::int64_t>& offsets, int levels,
                       std::int64_t memory_limit, const sl::PatternTree* share_budget_with) {
             if (codes.ndim() != 3) throw sl::ParameterError("training_image", "must be a 3-D array.");
             sl::CategoricalImage ti;
             ti.shape = {codes.shape(0), codes.shape(1), codes.shape(2)};
             ti.codes.assign(codes.data(), codes.data() + codes.size());
             ti.categories = categories;
             sl::Template tpl(offsets_from(offsets, "template"));
             py::gil_scoped_release release;
             if (share_budget_with) return new sl::PatternTree(std::move(ti), tpl, levels, share_budget_with->budget());
             return new sl::PatternTree(std::move(ti), tpl, levels, memory_limit);
           }),
           py::arg("codes"), py::arg("categories"), py::arg("offsets"), py::arg("levels"), py::arg("memory_limit"),
           py::arg("share_budget_with") = nullptr)
      .def_property_readonly("levels", &sl::PatternTree::levels)
      .def_property_readonly("categories", &sl::PatternTree::categories)
      .def_property_readonly("memory_bytes", &sl::PatternTree::memory_bytes)
      .def_property_readonly("node_bytes", &sl::PatternTree::node_bytes)
      .def_property_readonly("category_counts", [](const sl::PatternTree& t) {
        auto v = t.category_counts();
        return vector_to_array(std::move(v));
      })
      .def("node_count", &sl::PatternTree::node_count, py::arg("level"))
      .def("conditional",
           [](const sl::PatternTree& t, int level, const CArray<std::int32_t>& index, const CArray<std::uint8_t>& value,
              std::int64_t min_replicates, bool scan) {
             if (level < 0 || level >= t.levels()) throw sl::ParameterError("level", "is not a level of this tree.");
             if (index.size() != value.size()) throw sl::ParameterError("values", "must have one value per offset.");
             const int m = static_cast<int>(index.size());
             for (int i = 0; i < m; ++i) {
               if (index.data()[i] < 0 || static_cast<std::size_t>(index.data()[i]) >= t.template_size() ||
                   (i > 0 && index.data()[i] <= index.data()[i - 1]))
                 throw sl::ParameterError("offsets", "must be distinct template nodes.");
               if (value.data()[i] >= t.categories()) throw sl::ParameterError("values", "must be codes 0..K-1.");
             }
             sl::QueryScratch scratch;
             const sl::EventAnswer a = scan ? t.scan(level, index.data(), value.data(), m, min_replicates, scratch)
                                            : t.query(level, index.data(), value.data(), m, min_replicates, false, scratch);
             return py::make_tuple(vector_to_array(std::move(scratch.best)), a.replicates, a.kept);
           },
           py::arg("level"), py::arg("index"), py::arg("values"), py::arg("min_replicates"), py::arg("scan") = false)
;

  m.def("simulate_trees",
        [](const std::vector<const sl::PatternTree*>& trees, const py::object& zones, std::array<Index, 3> shape,
           const py::object& hard, const std::vector<CArray<double>>& soft, const std::vector<double>& tau,
           const std::vector<double>& target, double steering, std::uint64_t seed, int threads, int max_conditioning,
           std::int64_t min_replicates, std::int64_t max_batch, const py::object& progress) {
          const sl::Grid grid(to_ijk(shape));
          if (trees.empty() || trees[0] == nullptr) throw sl::ParameterError("trees", "must hold at least one pattern tree.");
          std::vector<std::int16_t> hard_codes;
          if (!hard.is_none()) {
            auto h = hard.cast<CArray<std::int16_t>>();
            if (h.size() != grid.size()) throw sl::ParameterError("hard", "must have the grid's shape.");
            hard_codes.assign(h.data(), h.data() + h.size());
          }
          std::vector<std::uint8_t> zone;
          if (!zones.is_none()) {
            auto z = zones.cast<CArray<std::uint8_t>>();
            if (z.size() != grid.size()) throw sl::ParameterError("zones", "must have the grid's shape.");
            zone.assign(z.data(), z.data() + z.size());
          }
          sl::TreeSimOptions opt;
          opt.seed = seed;
          opt.threads = threads;
          opt.max_conditioning = max_conditioning;
          opt.min_replicates = min_replicates;
          for (const auto& s : soft) {
            if (s.size() != grid.size() * trees[0]->categories())
              throw sl::ParameterError("soft", "must hold K probabilities per grid cell.");
            opt.soft.push_back(s.data());
          }
          opt.tau = tau;
          opt.target = target;
          opt.steering = steering;
          opt.max_batch = max_batch;
          const sl::Poll poll = make_poll(&progress);
          sl::TreeSimStats stats;
          std::vector<std::int16_t> out;
          {
            py::gil_scoped_release release;
            out = sl::simulate_trees(trees, zone, grid, hard_codes, opt, poll, &stats);
          }
          py::dict st;
          st["simulated"] = stats.simulated;
          st["mean_informed"] = stats.mean_informed;
          st["mean_kept"] = stats.mean_kept;
          st["scans"] = stats.scans;
          st["remembered"] = stats.remembered;
          st["relocated"] = stats.relocated;
          st["mean_visited"] = stats.mean_visited;
          st["seconds"] = stats.seconds;
          return py::make_tuple(vector_to_array(std::move(out)), st);
        },
        py::arg("trees"), py::arg("zones"), py::arg("shape"), py::arg("hard"), py::arg("soft"), py::arg("tau"),
        py::arg("target"), py::arg("steering"), py::arg("seed"), py::arg("threads"), py::arg("max_conditioning"),
        py::arg("min_replicates"), py::arg("max_batch"), py::arg("progress"));
}

// Direct sampling: the padded training image and one simulation call (GIL released inside).
void bind_direct(py::module_& m) {
  namespace ds = sl::direct;
  py::class_<ds::TrainingImage>(m, "DirectTrainingImage")
      .def(py::init([](std::array<Index, 3> shape, const std::vector<CArray<float>>& values, const std::vector<int>& kinds,
                       std::array<std::int32_t, 3> reach) {
             if (values.size() != kinds.size())
               throw sl::ParameterError("training_image", "must hold one kind per variable.");
             const Index cells = shape[0] * shape[1] * shape[2];
             std::vector<const float*> ptrs;
             std::vector<ds::Kind> ks;
             for (std::size_t v = 0; v < values.size(); ++v) {
               if (values[v].size() != cells)
                 throw sl::ParameterError("training_image", "must hold variables of the same shape.");
               if (kinds[v] != 0 && kinds[v] != 1) throw sl::ParameterError("kinds", "must be 0 (continuous) or 1 (categorical).");
               ptrs.push_back(values[v].data());
               ks.push_back(static_cast<ds::Kind>(kinds[v]));
             }
             py::gil_scoped_release release;
             return ds::TrainingImage(to_ijk(shape), ptrs, ks, {reach[0], reach[1], reach[2]});
           }),
           py::arg("shape"), py::arg("values"), py::arg("kinds"), py::arg("reach"))
      .def_property_readonly("shape", &ds::TrainingImage::shape)
      .def_property_readonly("reach", &ds::TrainingImage::reach)
      .def_property_readonly("variables", &ds::TrainingImage::variables);

  // One call for one or several zones: `tis[z]` with `zone_params[z]` = (neighbors, accept_distance,
  // scan_fraction, search, weights, lag_power); `zone` (int32 per cell) or None; `matrices` ((k, 9)
  // float64) and `classes` (int32 per cell) for the local geometry, or None.
  m.def(
      "direct_simulate",
      [](const std::vector<const ds::TrainingImage*>& tis, std::array<Index, 3> shape,
         const std::vector<CArray<float>>& state_in, const std::vector<bool>& auxiliary, const py::list& zone_params,
         const py::object& zone_in, const py::object& matrices_in, const py::object& classes_in, const std::string& path,
         std::uint64_t seed, int threads, const py::object& progress) {
        const sl::Grid grid(to_ijk(shape));
        if (zone_params.size() != tis.size() || tis.empty())
          throw sl::ParameterError("zones", "must give one parameter set per training image.");
        std::vector<ds::Params> params;
        for (const auto& item : zone_params) {
          const auto t = item.cast<py::tuple>();
          if (t.size() != 6) throw sl::ParameterError("zones", "must give parameter sets of 6 entries.");
          ds::Params p;
          p.neighbors = t[0].cast<std::int32_t>();
          p.accept_distance = t[1].cast<double>();
          p.scan_fraction = t[2].cast<double>();
          p.search = offsets_from(t[3].cast<CArray<std::int64_t>>(), "search_radius");
          p.weights = t[4].cast<std::vector<double>>();
          p.lag_power = t[5].cast<double>();
          if (path == "random")
            p.path = ds::PathKind::random;
          else if (path == "sweep")
            p.path = ds::PathKind::sweep;
          else
            throw sl::ParameterError("path", "must be 'random' or 'sweep'; got '" + path + "'.");
          p.seed = seed;
          p.threads = threads;
          params.push_back(std::move(p));
        }
        CArray<std::int32_t> zone, classes;
        CArray<double> matrices;
        if (!zone_in.is_none()) {
          zone = zone_in.cast<CArray<std::int32_t>>();
          if (zone.size() != grid.size()) throw sl::ParameterError("zones", "must hold one zone per grid cell.");
        }
        ds::Geometry geometry;
        if (!classes_in.is_none()) {
          classes = classes_in.cast<CArray<std::int32_t>>();
          matrices = matrices_in.cast<CArray<double>>();
          if (classes.size() != grid.size()) throw sl::ParameterError("rotation", "must hold one class per grid cell.");
          geometry.matrices.assign(matrices.data(), matrices.data() + matrices.size());
          geometry.cls = classes.data();
        }
        std::vector<py::array_t<float>> state;
        std::vector<float*> ptrs;
        for (const auto& a : state_in) {
          if (a.size() != grid.size()) throw sl::ParameterError("hard", "must hold arrays of the grid's shape.");
          py::array_t<float> copy(a.size());
          std::copy(a.data(), a.data() + a.size(), copy.mutable_data());
          ptrs.push_back(copy.mutable_data());
          state.push_back(std::move(copy));
        }
        py::array_t<std::int64_t> source(grid.size());
        std::int64_t* src = source.mutable_data();
        sl::WorkControl ctl;
        const sl::Poll poll = make_poll(&progress);
        const std::int32_t* zone_ptr = zone_in.is_none() ? nullptr : zone.data();
        ds::Stats st;
        {
          py::gil_scoped_release release;
          st = ds::simulate_zones(tis, params, zone_ptr, geometry, grid, ptrs, auxiliary, src, ctl, poll);
        }
        py::dict stats;
        stats["nodes"] = st.nodes;
        stats["candidates"] = st.candidates;
        stats["comparisons"] = st.comparisons;
        stats["accepted"] = st.accepted;
        stats["exact"] = st.exact;
        stats["waits"] = st.waits;
        stats["wait_seconds"] = st.wait_seconds;
        stats["distance_sum"] = st.distance_sum;
        stats["seconds"] = st.seconds;
        stats["setup_seconds"] = st.setup_seconds;
        stats["cpu_seconds"] = st.cpu_seconds;
        stats["threads"] = st.threads;
        return py::make_tuple(state, source, stats);
      },
      py::arg("tis"), py::arg("shape"), py::arg("state"), py::arg("auxiliary"), py::arg("zone_params"),
      py::arg("zone"), py::arg("matrices"), py::arg("classes"), py::arg("path"), py::arg("seed"), py::arg("threads"),
      py::arg("progress") = py::none());
}

}  // namespace

PYBIND11_MODULE(_core, m) {
  m.doc() = "Strata Loom compiled core (private; use the strataloom package).";
  m.attr("__version__") = STRATALOOM_VERSION;

  py::register_exception<sl::ParameterError>(m, "ParameterError", PyExc_ValueError);
  py::register_exception<sl::ParameterTypeError>(m, "ParameterTypeError", PyExc_TypeError);
  py::register_exception<sl::MemoryLimitError>(m, "MemoryLimitError", PyExc_MemoryError);
  py::register_exception_translator([](std::exception_ptr p) {
    try {
      if (p) std::rethrow_exception(p);
    } catch (const sl::Cancelled&) {
      py::set_error(PyExc_KeyboardInterrupt, "simulation cancelled");
    }
  });
  bind_core(m);
  bind_tree(m);
  bind_direct(m);
}
