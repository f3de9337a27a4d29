#include "server/api/auth.h"

#include <openssl/crypto.h>
#include <openssl/evp.h>
#include <sys/random.h>

#include <cstdint>

#include "absl/strings/escaping.h"
#include "absl/strings/match.h"
#include "absl/strings/str_cat.h"
#include "core/util/status_macros.h"

namespace foray::api {
namespace {

std::string RandomHex(size_t bytes) {
  std::string raw(bytes, '\0');
  size_t got = 0;
  while (got < bytes) {
    const ssize_t n = getrandom(raw.data() + got, bytes - got, 0);
    FORAY_CHECK(n > 0, "getrandom failed");
    got += static_cast<size_t>(n);
  }
  return absl::BytesToHexString(raw);
}

}  // namespace

std::string NewToken() { return RandomHex(32); }

std::string NewId(absl::string_view prefix) { return absl::StrCat(prefix, RandomHex(4)); }

std::string HashToken(absl::string_view token) {
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int length = 0;
  FORAY_CHECK(EVP_Digest(token.data(), token.size(), digest, &length, EVP_sha256(), nullptr) == 1,
              "SHA-256 failed");
  return absl::BytesToHexString(
      absl::string_view(reinterpret_cast<const char*>(digest), length));
}

bool SameHash(absl::string_view a, absl::string_view b) {
  return a.size() == b.size() && CRYPTO_memcmp(a.data(), b.data(), a.size()) == 0;
}

absl::StatusOr<std::string> BearerToken(const grpc::ServerContext& context) {
  const auto& metadata = context.client_metadata();
  auto it = metadata.find("authorization");
  if (it == metadata.end()) {
    return absl::UnauthenticatedError(
        "no credentials: send the metadata \"authorization: Bearer <token>\"");
  }
  const absl::string_view value(it->second.data(), it->second.size());
  constexpr absl::string_view kPrefix = "Bearer ";
  if (!absl::StartsWith(value, kPrefix) || value.size() == kPrefix.size()) {
    return absl::UnauthenticatedError(
        "the authorization metadata must be \"Bearer <token>\"");
  }
  return std::string(value.substr(kPrefix.size()));
}

}  // namespace foray::api
