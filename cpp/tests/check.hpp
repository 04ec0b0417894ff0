// Registration and assertion macros for the C++ unit tests.
#pragma once

#include <functional>
#include <stdexcept>
#include <string>
#include <vector>

namespace sl::test {

struct Case {
  const char* name;
  std::function<void()> fn;
};

inline std::vector<Case>& registry() {
  static std::vector<Case> cases;
  return cases;
}

struct Register {
  Register(const char* name, std::function<void()> fn) { registry().push_back({name, std::move(fn)}); }
};

}  // namespace sl::test

#define SL_TEST(name)                                              \
  static void name();                                              \
  static const ::sl::test::Register name##_registered(#name, name); \
  static void name()

#define SL_CHECK(cond)                                                                               \
  do {                                                                                               \
    if (!(cond)) throw std::runtime_error(std::string(__FILE__) + ":" + std::to_string(__LINE__) + \
                                          ": check failed: " #cond);                                 \
  } while (0)

#define SL_CHECK_THROWS(expr, Exception)              \
  do {                                                \
    bool thrown_ = false;                             \
    try {                                             \
      (void)(expr);                                   \
    } catch (const Exception&) {                      \
      thrown_ = true;                                 \
    }                                                 \
    if (!thrown_) throw std::runtime_error(std::string(__FILE__) + ":" + std::to_string(__LINE__) + \
                                           ": expected " #Exception " from " #expr);                \
  } while (0)
