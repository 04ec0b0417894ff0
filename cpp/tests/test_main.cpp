// A minimal test runner for the core: no Python, no third-party framework.
#include "tests/check.hpp"

#include <cstdio>

int main() {
  int failed = 0;
  for (const auto& t : sl::test::registry()) {
    try {
      t.fn();
      std::printf("ok      %s\n", t.name);
    } catch (const std::exception& e) {
      ++failed;
      std::printf("FAILED  %s: %s\n", t.name, e.what());
    }
  }
  const int passed = static_cast<int>(sl::test::registry().size()) - failed;
  std::printf("%d passed, %d failed\n", passed, failed);
  return failed ? 1 : 0;
}
