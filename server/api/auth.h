// Bearer tokens: making them, hashing them for storage, and reading them from a call.
// Tokens are 32 random bytes in hex; the store keeps only their SHA-256 (a plain hash is enough
// for high-entropy secrets, common practice). Thread-safe.
#ifndef FORAY_SERVER_API_AUTH_H_
#define FORAY_SERVER_API_AUTH_H_

#include <string>

#include "absl/status/statusor.h"
#include "absl/strings/string_view.h"
#include "grpcpp/server_context.h"

namespace foray::api {

// A fresh token: 64 hex characters from the kernel's random source.
std::string NewToken();

// A short random id with a prefix, e.g. "r-1f3a9c0d".
std::string NewId(absl::string_view prefix);

// Lowercase hex SHA-256 of the token.
std::string HashToken(absl::string_view token);

// True when the two hashes are equal, compared in constant time.
bool SameHash(absl::string_view a, absl::string_view b);

// The token of `authorization: Bearer <token>`; Unauthenticated naming what is missing.
absl::StatusOr<std::string> BearerToken(const grpc::ServerContext& context);

}  // namespace foray::api

#endif  // FORAY_SERVER_API_AUTH_H_
