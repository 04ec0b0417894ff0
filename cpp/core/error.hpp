// Exceptions of the core. Every precondition failure names the parameter it concerns, so the
// bindings can turn it into a Python ValueError/TypeError that a user can act on.
#pragma once

#include <stdexcept>
#include <string>

namespace sl {

// A parameter has a value outside its allowed range or an inconsistent shape (Python: ValueError).
class ParameterError : public std::invalid_argument {
 public:
  ParameterError(std::string parameter, const std::string& message)
      : std::invalid_argument("The parameter '" + parameter + "' " + message),
        parameter_(std::move(parameter)) {}
  const std::string& parameter() const noexcept { return parameter_; }

 private:
  std::string parameter_;
};

// A parameter has the wrong kind of value (Python: TypeError).
class ParameterTypeError : public std::invalid_argument {
 public:
  ParameterTypeError(std::string parameter, const std::string& message)
      : std::invalid_argument("The parameter '" + parameter + "' " + message),
        parameter_(std::move(parameter)) {}
  const std::string& parameter() const noexcept { return parameter_; }

 private:
  std::string parameter_;
};

// A structure would need more memory than the caller allowed (Python: MemoryError).
class MemoryLimitError : public std::runtime_error {
 public:
  using std::runtime_error::runtime_error;
};

// The caller asked the work to stop (Python: KeyboardInterrupt when it came from Ctrl-C).
class Cancelled : public std::runtime_error {
 public:
  Cancelled() : std::runtime_error("cancelled") {}
};

// Throws ParameterError(parameter, message) unless `condition` holds.
inline void require(bool condition, const char* parameter, const std::string& message) {
  if (!condition) throw ParameterError(parameter, message);
}

}  // namespace sl
