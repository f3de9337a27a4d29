// Small status helpers (the Abseil release Foray builds against has no status macros).
// Safe to use from any thread: they only expand to local control flow.
#ifndef FORAY_CORE_UTIL_STATUS_MACROS_H_
#define FORAY_CORE_UTIL_STATUS_MACROS_H_

#include <cstdio>
#include <cstdlib>

#include "absl/status/status.h"
#include "absl/status/statusor.h"

#define FORAY_CONCAT_INNER_(a, b) a##b
#define FORAY_CONCAT_(a, b) FORAY_CONCAT_INNER_(a, b)

// Returns from the enclosing function when `expr` (an absl::Status) is not OK.
#define FORAY_RETURN_IF_ERROR(expr)                  \
  do {                                               \
    ::absl::Status foray_status_ = (expr);           \
    if (!foray_status_.ok()) return foray_status_;   \
  } while (0)

// `FORAY_ASSIGN_OR_RETURN(auto x, MakeX());` unwraps an absl::StatusOr or returns its status.
#define FORAY_ASSIGN_OR_RETURN(lhs, expr) \
  FORAY_ASSIGN_OR_RETURN_IMPL_(FORAY_CONCAT_(foray_statusor_, __LINE__), lhs, expr)
#define FORAY_ASSIGN_OR_RETURN_IMPL_(tmp, lhs, expr) \
  auto tmp = (expr);                                 \
  if (!tmp.ok()) return tmp.status();                \
  lhs = std::move(tmp).value()

// Always-on invariant check: a failure is a bug, so it aborts with the message.
#define FORAY_CHECK(cond, msg)                                                  \
  do {                                                                          \
    if (!(cond)) {                                                              \
      std::fprintf(stderr, "%s:%d: check failed: %s: %s\n", __FILE__, __LINE__, \
                   #cond, msg);                                                 \
      std::abort();                                                             \
    }                                                                           \
  } while (0)

#endif  // FORAY_CORE_UTIL_STATUS_MACROS_H_
