#!/usr/bin/env bash
# Builds the core with AddressSanitizer + UndefinedBehaviorSanitizer, runs the C++ unit tests,
# then builds the Python extension the same way in a throw-away venv and runs a fast subset of
# the Python tests with the sanitizer runtimes preloaded (engine tests, fuzzing, the API bad inputs).
# Usage: bash cpp/tests/run_sanitizers.sh (about 6 min on 2 cores; .ci/run runs it last).
set -euo pipefail
cd "$(dirname "$0")/../.."
root=$(pwd)
build="$root/build/sanitize"

echo "== C++ unit tests under ASan + UBSan"
cmake -S . -B "$build/cpp" -DCMAKE_BUILD_TYPE=RelWithDebInfo -DSTRATALOOM_SANITIZE=ON -DSTRATALOOM_BUILD_TESTS=ON
cmake --build "$build/cpp" --parallel 2
UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1 "$build/cpp/strataloom_cpp_tests"

echo "== Python tests on a sanitized extension"
venv="$build/venv"
rm -rf "$venv"
python3 -m venv "$venv"
# shellcheck disable=SC1091
source "$venv/bin/activate"
python -m pip install -q ".[test]" -Ccmake.build-type=RelWithDebInfo -Ccmake.define.STRATALOOM_SANITIZE=ON \
  -Cbuild-dir="$build/wheel"
runtime="$(gcc -print-file-name=libasan.so):$(gcc -print-file-name=libubsan.so)"
LD_PRELOAD="$runtime" ASAN_OPTIONS=detect_leaks=0 UBSAN_OPTIONS=halt_on_error=1:print_stacktrace=1 \
  python -m pytest -q -p no:cacheprovider -k "not ctrl_c" tests/test_tree_counts.py \
  tests/test_tree_errors.py tests/test_tree_fuzz.py tests/test_direct.py tests/test_direct_errors.py \
  tests/test_direct_fuzz.py tests/test_grid.py tests/test_template.py tests/test_random.py \
  tests/test_tree_geometry.py tests/test_direct_geometry.py \
  tests/test_bad_inputs.py::test_api_bad_input tests/test_bad_inputs.py::test_non_contiguous_arrays_give_the_result_of_their_copies
