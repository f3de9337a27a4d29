#include "server/api/write_watch.h"

#include <cstdio>
#include <utility>

#include "absl/time/clock.h"

namespace foray::api {

WriteWatch::WriteWatch(absl::Duration limit, absl::Duration poll) : limit_(limit), poll_(poll) {
  if (limit_ > absl::ZeroDuration()) thread_ = std::thread([this] { Run(); });
}

WriteWatch::~WriteWatch() {
  {
    absl::MutexLock lock(&mu_);
    stopping_ = true;
  }
  if (thread_.joinable()) thread_.join();
}

void WriteWatch::Run() {
  absl::MutexLock lock(&mu_);
  auto stopping = [this]() ABSL_EXCLUSIVE_LOCKS_REQUIRED(mu_) { return stopping_; };
  while (!mu_.AwaitWithTimeout(absl::Condition(&stopping), poll_)) {
    const absl::Time now = absl::Now();
    for (auto& [call, entry] : calls_) {
      if (entry.cancelled || now - entry.writing_since <= limit_) continue;
      // Under the lock: the handler cannot have returned (its Call waits for the lock).
      entry.context->TryCancel();
      entry.cancelled = true;
      std::fprintf(stderr,
                   "forayd: ended the %s: its client has not read for %s (flow control; "
                   "forayd --stalled_write_timeout_s)\n",
                   entry.what.c_str(), absl::FormatDuration(now - entry.writing_since).c_str());
    }
  }
}

WriteWatch::Call::Call(WriteWatch* watch, grpc::ServerContextBase* context, std::string what)
    : watch_(watch != nullptr && watch->limit_ > absl::ZeroDuration() ? watch : nullptr) {
  if (watch_ == nullptr) return;
  absl::MutexLock lock(&watch_->mu_);
  entry_ = &watch_->calls_[this];
  entry_->context = context;
  entry_->what = std::move(what);
}

WriteWatch::Call::~Call() {
  if (watch_ == nullptr) return;
  absl::MutexLock lock(&watch_->mu_);
  watch_->calls_.erase(this);
}

void WriteWatch::Call::Begin() {
  if (watch_ == nullptr) return;
  absl::MutexLock lock(&watch_->mu_);
  entry_->writing_since = absl::Now();
}

void WriteWatch::Call::End() {
  if (watch_ == nullptr) return;
  absl::MutexLock lock(&watch_->mu_);
  entry_->writing_since = absl::InfiniteFuture();
}

}  // namespace foray::api
