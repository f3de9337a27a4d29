// A small, portable pseudo-random generator (xoshiro256**, seeded by splitmix64) with uniform
// and normal draws, so results under a seed are the same on every standard library.
// Not thread-safe: give each thread its own generator.
#ifndef FORAY_CORE_UTIL_RANDOM_H_
#define FORAY_CORE_UTIL_RANDOM_H_

#include <cmath>
#include <cstdint>

namespace foray {

class Rng {
 public:
  // Copyable (a copy continues the same stream independently).
  explicit Rng(uint64_t seed) {
    uint64_t x = seed;
    for (uint64_t& s : state_) s = SplitMix64(&x);
  }

  uint64_t NextU64() {
    const uint64_t result = Rotl(state_[1] * 5, 7) * 9;
    const uint64_t t = state_[1] << 17;
    state_[2] ^= state_[0];
    state_[3] ^= state_[1];
    state_[1] ^= state_[2];
    state_[0] ^= state_[3];
    state_[2] ^= t;
    state_[3] = Rotl(state_[3], 45);
    return result;
  }

  // Uniform on [0, 1) with 53 random bits.
  double Uniform() { return static_cast<double>(NextU64() >> 11) * 0x1.0p-53; }

  // Uniform integer on [0, n); n > 0. Lemire's multiply-shift (bias below 2^-64 * n).
  uint64_t UniformInt(uint64_t n) {
    return static_cast<uint64_t>((static_cast<__uint128_t>(NextU64()) * n) >> 64);
  }

  // Standard normal draw (Box-Muller; the second value is kept for the next call).
  double Normal() {
    if (has_spare_) {
      has_spare_ = false;
      return spare_;
    }
    double u1 = Uniform();
    while (u1 <= 0.0) u1 = Uniform();
    const double u2 = Uniform();
    const double r = std::sqrt(-2.0 * std::log(u1));
    const double theta = 2.0 * 3.14159265358979323846 * u2;
    spare_ = r * std::sin(theta);
    has_spare_ = true;
    return r * std::cos(theta);
  }

 private:
  static uint64_t Rotl(uint64_t x, int k) { return (x << k) | (x >> (64 - k)); }
  static uint64_t SplitMix64(uint64_t* x) {
    uint64_t z = (*x += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
  }

  uint64_t state_[4];
  double spare_ = 0.0;
  bool has_spare_ = false;
};

// The seed of stream `stream` of a computation seeded with `seed` (a plan's iterations, a
// model version's training): the SplitMix64 finaliser (Steele, Lea & Flood 2014, "Fast
// splittable pseudorandom number generators", OOPSLA) of seed + golden-ratio * (stream + 1), so
// that neighbouring seeds and streams give unrelated generators. The one place seeds are
// derived: no other constants mix seeds.
inline uint64_t DeriveSeed(uint64_t seed, uint64_t stream) {
  uint64_t z = seed + 0x9e3779b97f4a7c15ULL * (stream + 1);
  z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
  z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
  return z ^ (z >> 31);
}

}  // namespace foray

#endif  // FORAY_CORE_UTIL_RANDOM_H_
