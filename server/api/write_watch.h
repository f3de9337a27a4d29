// Ends streams whose writes stall. A client that stops reading (hung, or a bug that never
// drains its replies) fills gRPC's flow-control window, and the next Write blocks for as long
// as the connection lives: keepalive does not help, the peer still answers pings. Each such
// stream holds a handler thread of the server's pool. The watch times every write of the
// calls registered with it and cancels a call whose write has waited longer than the limit;
// the blocked Write then returns false and the handler ends as for a client that left.
// Thread-safe; one watch (one thread) serves every call.
//
//   WriteWatch watch(absl::Seconds(120));
//   WriteWatch::Call call(&watch, context, "session of robot \"cart-1\"");
//   if (!call.Write(stream, reply)) ...   // the client left, or stalled past the limit
#ifndef FORAY_SERVER_API_WRITE_WATCH_H_
#define FORAY_SERVER_API_WRITE_WATCH_H_

#include <map>
#include <string>
#include <thread>

#include "absl/base/thread_annotations.h"
#include "absl/synchronization/mutex.h"
#include "absl/time/time.h"
#include "grpcpp/server_context.h"

namespace foray::api {

class WriteWatch {
 private:
  struct Entry {
    grpc::ServerContextBase* context = nullptr;
    std::string what;
    absl::Time writing_since = absl::InfiniteFuture();  // InfiniteFuture: not writing
    bool cancelled = false;
  };

 public:
  // `limit` <= 0 turns the watch off (writes are not timed). `poll`: how often it looks.
  explicit WriteWatch(absl::Duration limit, absl::Duration poll = absl::Milliseconds(250));
  WriteWatch(const WriteWatch&) = delete;
  WriteWatch& operator=(const WriteWatch&) = delete;
  ~WriteWatch();

  // One call's registration, for the handler's lifetime (the watch never touches the context
  // after the Call is destroyed).
  class Call {
   public:
    // `watch` may be null (no watch). `what` names the call in the server's log.
    Call(WriteWatch* watch, grpc::ServerContextBase* context, std::string what);
    Call(const Call&) = delete;
    Call& operator=(const Call&) = delete;
    ~Call();

    // stream->Write(message), timed by the watch.
    template <typename Stream, typename Message>
    bool Write(Stream* stream, const Message& message) {
      Begin();
      const bool ok = stream->Write(message);
      End();
      return ok;
    }

   private:
    void Begin();
    void End();
    WriteWatch* const watch_;
    Entry* entry_ = nullptr;  // this call's record in the watch (map nodes do not move)
  };

 private:
  void Run();

  const absl::Duration limit_;
  const absl::Duration poll_;
  mutable absl::Mutex mu_;
  std::map<const Call*, Entry> calls_ ABSL_GUARDED_BY(mu_);
  bool stopping_ ABSL_GUARDED_BY(mu_) = false;
  std::thread thread_;
};

}  // namespace foray::api

#endif  // FORAY_SERVER_API_WRITE_WATCH_H_
