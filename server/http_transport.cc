#include "server/http_transport.h"

#include <netdb.h>
#include <netinet/in.h>
#include <netinet/tcp.h>
#include <spdlog/spdlog.h>
#include <sys/epoll.h>
#include <sys/eventfd.h>
#include <sys/socket.h>
#include <sys/uio.h>
#include <unistd.h>

#include <algorithm>
#include <atomic>
#include <cctype>
#include <cerrno>
#include <chrono>
#include <condition_variable>
#include <cstdio>
#include <cstring>
#include <deque>
#include <mutex>
#include <new>
#include <string_view>
#include <thread>
#include <unordered_map>
#include <utility>
#include <vector>

#include "server/thread_setup.h"

namespace mdp::server {
namespace {

constexpr size_t kMaxHeadBytes = size_t{16} << 10;  // Request line and header fields.
constexpr size_t kMaxTargetBytes = 8192;
constexpr size_t kMaxHeaderFields = 100;
constexpr size_t kMaxChunkLineBytes = 1024;
constexpr size_t kReadBytes = size_t{256} << 10;  // Per recv().
constexpr int64_t kLingerMs = 5000;  // How long a closing connection's input is drained.

int64_t NowMs() {
  return std::chrono::duration_cast<std::chrono::milliseconds>(
             std::chrono::steady_clock::now().time_since_epoch())
      .count();
}

// tchar of RFC 9110, sec. 5.6.2.
bool IsTokenChar(unsigned char c) {
  if (std::isalnum(c) != 0) return true;
  return std::strchr("!#$%&'*+-.^_`|~", c) != nullptr && c != '\0';
}

bool IsToken(std::string_view s) {
  return !s.empty() && std::all_of(s.begin(), s.end(), [](char c) {
    return IsTokenChar(static_cast<unsigned char>(c));
  });
}

bool EqualsIgnoreCase(std::string_view a, std::string_view b) {
  return a.size() == b.size() && std::equal(a.begin(), a.end(), b.begin(), [](char x, char y) {
           return std::tolower(static_cast<unsigned char>(x)) ==
                  std::tolower(static_cast<unsigned char>(y));
         });
}

std::string_view TrimWhitespace(std::string_view s) {
  while (!s.empty() && (s.front() == ' ' || s.front() == '\t')) s.remove_prefix(1);
  while (!s.empty() && (s.back() == ' ' || s.back() == '\t')) s.remove_suffix(1);
  return s;
}

// True iff the comma-separated list `value` has `token` as an element (case-insensitive).
bool ListsToken(std::string_view value, std::string_view token) {
  while (!value.empty()) {
    const size_t comma = value.find(',');
    if (EqualsIgnoreCase(TrimWhitespace(value.substr(0, comma)), token)) return true;
    if (comma == std::string_view::npos) break;
    value.remove_prefix(comma + 1);
  }
  return false;
}

int HexValue(char c) {
  if (c >= '0' && c <= '9') return c - '0';
  if (c >= 'a' && c <= 'f') return c - 'a' + 10;
  if (c >= 'A' && c <= 'F') return c - 'A' + 10;
  return -1;
}

// Percent-decoding (a '%' not followed by two hex digits stays as it is); in a query, '+'
// is a space.
std::string Decode(std::string_view s, bool plus_is_space) {
  std::string out;
  out.reserve(s.size());
  for (size_t i = 0; i < s.size(); ++i) {
    if (s[i] == '%' && i + 2 < s.size() && HexValue(s[i + 1]) >= 0 && HexValue(s[i + 2]) >= 0) {
      out += static_cast<char>(HexValue(s[i + 1]) * 16 + HexValue(s[i + 2]));
      i += 2;
    } else if (plus_is_space && s[i] == '+') {
      out += ' ';
    } else {
      out += s[i];
    }
  }
  return out;
}

void ParseQuery(std::string_view query, httplib::Params& params) {
  while (!query.empty()) {
    const size_t amp = query.find('&');
    const std::string_view pair = query.substr(0, amp);
    if (!pair.empty()) {
      const size_t eq = pair.find('=');
      params.emplace(Decode(pair.substr(0, eq), true),
                     eq == std::string_view::npos ? "" : Decode(pair.substr(eq + 1), true));
    }
    if (amp == std::string_view::npos) break;
    query.remove_prefix(amp + 1);
  }
}

const char* Reason(int status) {
  switch (status) {
    case 100:
      return "Continue";
    case 200:
      return "OK";
    case 201:
      return "Created";
    case 202:
      return "Accepted";
    case 204:
      return "No Content";
    case 303:
      return "See Other";
    case 304:
      return "Not Modified";
    case 400:
      return "Bad Request";
    case 401:
      return "Unauthorized";
    case 403:
      return "Forbidden";
    case 404:
      return "Not Found";
    case 405:
      return "Method Not Allowed";
    case 409:
      return "Conflict";
    case 410:
      return "Gone";
    case 413:
      return "Content Too Large";
    case 414:
      return "URI Too Long";
    case 415:
      return "Unsupported Media Type";
    case 422:
      return "Unprocessable Content";
    case 429:
      return "Too Many Requests";
    case 431:
      return "Request Header Fields Too Large";
    case 500:
      return "Internal Server Error";
    case 501:
      return "Not Implemented";
    case 503:
      return "Service Unavailable";
    case 505:
      return "HTTP Version Not Supported";
    default:
      return "Status";
  }
}

enum class Phase { kHead, kBody, kChunkSize, kChunkData, kChunkEnd, kTrailers, kLinger };

struct Conn {
  int fd = -1;
  std::string in;           // Received and not yet parsed.
  size_t head_scanned = 0;  // How much of `in` is known not to hold the end of the head.
  Phase phase = Phase::kHead;
  httplib::Request req;  // The request being read.
  std::string body;
  uint64_t remaining = 0;   // Body (or chunk) bytes still to come.
  bool over_limit = false;  // A chunked body went over the limit: the rest is dropped.
  bool keep_alive = true;
  size_t trailer_bytes = 0;
  std::atomic<int64_t> last_active_ms{0};
  std::atomic<bool> busy{false};       // A thread owns it (between its event and its re-arming).
  std::atomic<bool> lingering{false};  // Answered for the last time; input is drained.
  std::atomic<bool> writing{false};    // Waiting for the client to take the pending answer.
  // The answer not yet written (head, then body), and how much of it has been.
  std::string out_head;
  std::string out_body;
  size_t out_sent = 0;
  // A streamed answer still producing its body: called for the next piece once the previous
  // one is written, with the number of body bytes produced so far.
  httplib::ContentProvider stream;
  bool stream_chunked = false;  // Pieces are framed as chunks (HTTP/1.1), else sent as is.
  size_t stream_offset = 0;
  bool close_after_output = false;  // Half-close and drain once the answer is written.
};

// What parsing the received bytes came to.
struct Step {
  enum Kind { kNeedMore, kReady, kRefuse } kind = kNeedMore;
  int status = 0;      // kRefuse: the status to answer with.
  std::string reason;  // kRefuse: why.
  bool keep = false;   // kRefuse: the connection stays usable after the answer.
};

// sendmsg() of the parts without SIGPIPE, again after a signal: the bytes sent, or -1 with
// errno set.
ssize_t Send(int fd, iovec* parts, int count) {
  msghdr message{};
  message.msg_iov = parts;
  message.msg_iovlen = static_cast<size_t>(count);
  ssize_t n;
  do {
    n = ::sendmsg(fd, &message, MSG_NOSIGNAL);
  } while (n < 0 && errno == EINTR);
  return n;
}

Step Ready() {
  Step step;
  step.kind = Step::kReady;
  return step;
}

Step Refuse(int status, std::string reason, bool keep = false) {
  return Step{Step::kRefuse, status, std::move(reason), keep};
}

}  // namespace

struct HttpTransport::Impl {
  Impl(TransportOptions o, RequestHandler h, RefusalHandler r)
      : options(std::move(o)), handler(std::move(h)), refusal(std::move(r)) {}

  ~Impl() {
    for (auto& [raw, conn] : conns) ::close(conn->fd);
    if (listen_fd >= 0) ::close(listen_fd);
    if (epoll_fd >= 0) ::close(epoll_fd);
    if (wake_fd >= 0) ::close(wake_fd);
  }

  Status Bind() {
    addrinfo hints{};
    hints.ai_family = AF_UNSPEC;
    hints.ai_socktype = SOCK_STREAM;
    hints.ai_flags = AI_PASSIVE | AI_NUMERICSERV;
    addrinfo* found = nullptr;
    const std::string service = std::to_string(options.port);
    const char* host = options.host.empty() ? nullptr : options.host.c_str();
    const Status unavailable(StatusCode::kUnavailable, "cannot listen on " + options.host + ":" +
                                                           std::to_string(options.port));
    if (::getaddrinfo(host, service.c_str(), &hints, &found) != 0) return unavailable;
    for (addrinfo* a = found; a != nullptr && listen_fd < 0; a = a->ai_next) {
      const int fd =
          ::socket(a->ai_family, a->ai_socktype | SOCK_NONBLOCK | SOCK_CLOEXEC, a->ai_protocol);
      if (fd < 0) continue;
      // SO_REUSEADDR only: a second server on the same port fails to bind instead of
      // silently sharing it.
      const int yes = 1;
      ::setsockopt(fd, SOL_SOCKET, SO_REUSEADDR, &yes, sizeof yes);
      if (::bind(fd, a->ai_addr, a->ai_addrlen) == 0 && ::listen(fd, SOMAXCONN) == 0) {
        listen_fd = fd;
      } else {
        ::close(fd);
      }
    }
    ::freeaddrinfo(found);
    if (listen_fd < 0) return unavailable;
    sockaddr_storage addr{};
    socklen_t length = sizeof addr;
    ::getsockname(listen_fd, reinterpret_cast<sockaddr*>(&addr), &length);
    bound_port = addr.ss_family == AF_INET6
                     ? ntohs(reinterpret_cast<sockaddr_in6*>(&addr)->sin6_port)
                     : ntohs(reinterpret_cast<sockaddr_in*>(&addr)->sin_port);
    epoll_fd = ::epoll_create1(EPOLL_CLOEXEC);
    wake_fd = ::eventfd(0, EFD_NONBLOCK | EFD_CLOEXEC);
    if (epoll_fd < 0 || wake_fd < 0) return unavailable;
    epoll_event wake{};
    wake.events = EPOLLIN;  // Level-triggered: once written, it wakes every thread.
    wake.data.ptr = &wake_tag;
    epoll_event listen{};
    listen.events = EPOLLIN | EPOLLONESHOT;
    listen.data.ptr = &listen_tag;
    if (::epoll_ctl(epoll_fd, EPOLL_CTL_ADD, wake_fd, &wake) != 0 ||
        ::epoll_ctl(epoll_fd, EPOLL_CTL_ADD, listen_fd, &listen) != 0) {
      return unavailable;
    }
    return Status::Ok();
  }

  void Serve() {
    std::vector<std::thread> threads;
    for (int i = 0; i < std::max(1, options.threads); ++i) threads.emplace_back([this] { Work(); });
    for (int i = 0; i < options.large_request_threads; ++i) {
      threads.emplace_back([this] { WorkOnLargeRequests(); });
    }
    {
      std::unique_lock<std::mutex> lock(stop_mu);
      while (!stopping.load()) {
        stop_cv.wait_for(lock, std::chrono::seconds(1));
        if (!stopping.load()) Reap();
      }
    }
    for (std::thread& t : threads) t.join();
  }

  void Stop() {
    {
      std::lock_guard<std::mutex> lock(stop_mu);
      stopping.store(true);
    }
    if (wake_fd >= 0) {
      const uint64_t one = 1;
      [[maybe_unused]] const ssize_t n = ::write(wake_fd, &one, sizeof one);
    }
    stop_cv.notify_all();
    large_cv.notify_all();
  }

  // Answers the requests Offload() queued, the queue's remainder included once stopping,
  // and gives each connection back to the set to write its answer and read on.
  void WorkOnLargeRequests() {
    BecomeBackgroundThread("mdp-upload", options.large_request_niceness);
    for (;;) {
      Conn* c = nullptr;
      {
        std::unique_lock<std::mutex> lock(large_mu);
        large_cv.wait(lock, [this] { return stopping.load() || !large_queue.empty(); });
        if (large_queue.empty()) return;
        c = large_queue.front();
        large_queue.pop_front();
      }
      Answer(c);
      Rearm(c, /*output=*/true);
    }
  }

  // Hands the complete request on `c` to the large-request threads iff its body is at least
  // large_request_bytes (and there are such threads): parsing a large model takes seconds,
  // which would hold a thread that answers queries. The connection stays out of the set, as
  // when a thread owns it, until its answer is ready.
  // kFull: the queue is full, and the request must be refused.
  enum class Offloaded { kNo, kQueued, kFull };
  Offloaded Offload(Conn* c) {
    if (options.large_request_threads <= 0 ||
        static_cast<int64_t>(c->body.size()) < options.large_request_bytes) {
      return Offloaded::kNo;
    }
    {
      std::lock_guard<std::mutex> lock(large_mu);
      if (static_cast<int64_t>(large_queue.size()) >= options.large_request_queue) {
        return Offloaded::kFull;
      }
      large_queue.push_back(c);
    }
    large_cv.notify_one();
    return Offloaded::kQueued;
  }

  void Work() {
    NameThisThread("mdp-http");
    // A refusal leaves the kernel's default slice; serve.cc checks once at start and logs it.
    if (options.thread_slice_us > 0) (void)SetThisThreadSlice(options.thread_slice_us);
    // Where this thread's recv() puts a request head: appending what arrived to the
    // connection's buffer copies only those bytes, where growing the buffer by kReadBytes
    // zero-filled 256 KiB per read (a quarter of the server's time under query load).
    const std::unique_ptr<char[]> scratch(new char[kReadBytes]);
    epoll_event event{};
    while (!stopping.load()) {
      const int n = ::epoll_wait(epoll_fd, &event, 1, -1);
      if (n < 0) {
        if (errno == EINTR) continue;
        spdlog::error("http: epoll_wait failed: {}", std::strerror(errno));
        return;
      }
      if (n == 0) continue;
      if (event.data.ptr == &wake_tag) return;
      if (event.data.ptr == &listen_tag) {
        Accept();
        continue;
      }
      ServeConnection(static_cast<Conn*>(event.data.ptr), scratch.get());
    }
  }

  void Accept() {
    for (;;) {
      const int fd = ::accept4(listen_fd, nullptr, nullptr, SOCK_NONBLOCK | SOCK_CLOEXEC);
      if (fd < 0) {
        if (errno == EINTR || errno == ECONNABORTED) continue;
        if (errno == EMFILE || errno == ENFILE || errno == ENOBUFS || errno == ENOMEM) {
          spdlog::warn("http: cannot accept a connection: {}", std::strerror(errno));
          std::this_thread::sleep_for(std::chrono::milliseconds(10));  // Not a busy loop.
        }
        break;
      }
      const int yes = 1;  // Small answers must not wait on Nagle + delayed ACK.
      ::setsockopt(fd, IPPROTO_TCP, TCP_NODELAY, &yes, sizeof yes);
      auto conn = std::make_unique<Conn>();
      conn->fd = fd;
      conn->last_active_ms = NowMs();
      Conn* raw = conn.get();
      {
        std::lock_guard<std::mutex> lock(conns_mu);
        if (static_cast<int64_t>(conns.size()) >= options.max_connections) {
          ::close(fd);
          continue;
        }
        conns.emplace(raw, std::move(conn));
      }
      raw->busy.store(false, std::memory_order_release);  // Hands it over (ServeConnection).
      epoll_event event{};
      event.events = EPOLLIN | EPOLLRDHUP | EPOLLONESHOT;
      event.data.ptr = raw;
      if (::epoll_ctl(epoll_fd, EPOLL_CTL_ADD, fd, &event) != 0) Close(raw);
    }
    epoll_event listen{};
    listen.events = EPOLLIN | EPOLLONESHOT;
    listen.data.ptr = &listen_tag;
    ::epoll_ctl(epoll_fd, EPOLL_CTL_MOD, listen_fd, &listen);
  }

  // Gives the connection back to the epoll set, waiting for input, or with `output` for
  // room to write the pending answer.
  void Rearm(Conn* c, bool output = false) {
    c->writing.store(output);
    c->busy.store(false, std::memory_order_release);
    epoll_event event{};
    event.events = (output ? EPOLLOUT : EPOLLIN) | EPOLLRDHUP | EPOLLONESHOT;
    event.data.ptr = c;
    if (::epoll_ctl(epoll_fd, EPOLL_CTL_MOD, c->fd, &event) != 0) Close(c);
  }

  void Close(Conn* c) {
    std::unique_ptr<Conn> owned;
    {
      std::lock_guard<std::mutex> lock(conns_mu);
      auto it = conns.find(c);
      if (it == conns.end()) return;
      owned = std::move(it->second);
      conns.erase(it);
    }
    ::close(owned->fd);
  }

  // Closes idle connections after the idle timeout, those whose client does not take its
  // answer after the write timeout and lingering ones after kLingerMs, by
  // shutting their sockets down: the thread that then gets the connection's event reads
  // the end of input and closes it.
  void Reap() {
    const int64_t now = NowMs();
    const int64_t idle_ms = int64_t{options.idle_timeout_seconds} * 1000;
    std::lock_guard<std::mutex> lock(conns_mu);
    for (auto& [raw, c] : conns) {
      if (c->busy.load()) continue;
      const int64_t limit = c->lingering.load() ? kLingerMs
                            : c->writing.load() ? int64_t{options.write_timeout_seconds} * 1000
                                                : idle_ms;
      if (now - c->last_active_ms.load() > limit) {
        ::shutdown(c->fd, SHUT_RDWR);
        c->last_active_ms = now;
      }
    }
  }

  // Writes the pending answer, then reads, parses and answers on a connection until it has
  // no complete request left, then re-arms it (or closes it). An answer the client does not
  // take is left pending: the thread moves on, and the connection waits for room.
  // `scratch`: the calling thread's buffer of kReadBytes.
  void ServeConnection(Conn* c, char* scratch) {
    // Acquires what the connection's previous owner released in Rearm() (or Accept()): the
    // epoll set hands the connection over, and this makes the handover visible to the
    // memory model (and to ThreadSanitizer) too.
    c->busy.exchange(true, std::memory_order_acq_rel);
    bool produced = false;  // A piece of a streamed answer was produced on this turn.
    // The last recv() on this turn returned less than it asked for: the socket was empty
    // then, so another recv() would only say EAGAIN. Re-arming instead costs one system call
    // less per request, and loses nothing: EPOLL_CTL_MOD reports input that came since.
    bool drained = false;
    for (;;) {
      if (c->out_sent < c->out_head.size() + c->out_body.size()) {
        const Flushed flushed = Flush(c);
        if (flushed == Flushed::kFailed) return Close(c);
        if (flushed == Flushed::kPending) return Rearm(c, true);
      }
      if (c->stream) {
        // One piece per turn, then back to the set: a client that takes a long answer
        // quickly shares the thread with the others instead of keeping it to the end.
        if (produced) return Rearm(c, true);
        produced = true;
        if (!Produce(c)) return Close(c);
        continue;
      }
      if (c->close_after_output) {
        // Half-close and drain what the client still sends until it closes too: a close
        // with unread input would reset the connection and could destroy the answer before
        // the client reads it.
        c->close_after_output = false;
        ::shutdown(c->fd, SHUT_WR);
        c->phase = Phase::kLinger;
        c->lingering.store(true);
        c->in.clear();
        c->last_active_ms = NowMs();
      }
      if (c->phase != Phase::kLinger) {
        const Step step = Parse(c);
        if (step.kind == Step::kReady) {
          const Offloaded offloaded = Offload(c);
          if (offloaded == Offloaded::kQueued) return;
          if (offloaded == Offloaded::kFull) {
            std::string().swap(c->body);
            Step busy;
            busy.status = 429;
            busy.reason = "other large requests are waiting; send it again later";
            busy.keep = true;
            AnswerRefusal(c, busy);
          } else {
            Answer(c);
          }
          continue;
        }
        if (step.kind == Step::kRefuse) {
          AnswerRefusal(c, step);
          continue;
        }
        if (c->out_sent < c->out_head.size()) continue;  // "100 Continue" goes out first.
      }
      // Need more input. A body of declared length is read straight into its buffer.
      if (drained) return Rearm(c);
      ssize_t n;
      size_t want = kReadBytes;
      if (c->phase == Phase::kBody && c->in.empty()) {
        const size_t old = c->body.size();
        want = static_cast<size_t>(std::min<uint64_t>(c->remaining, kReadBytes));
        c->body.resize(old + want);
        n = ::recv(c->fd, c->body.data() + old, want, 0);
        c->body.resize(old + static_cast<size_t>(std::max<ssize_t>(n, 0)));
        if (n > 0) c->remaining -= static_cast<uint64_t>(n);
      } else {
        n = ::recv(c->fd, scratch, kReadBytes, 0);
        if (n > 0 && c->phase != Phase::kLinger) c->in.append(scratch, static_cast<size_t>(n));
      }
      if (n > 0) {
        c->last_active_ms = NowMs();
        drained = static_cast<size_t>(n) < want;
        continue;
      }
      if (n < 0 && errno == EINTR) continue;
      if (n < 0 && (errno == EAGAIN || errno == EWOULDBLOCK)) return Rearm(c);
      return Close(c);  // End of input (or an error): a request cut short gets no answer.
    }
  }

  void ResetRequest(Conn* c) {
    c->req = httplib::Request();
    std::string().swap(c->body);
    c->remaining = 0;
    c->over_limit = false;
    c->trailer_bytes = 0;
    c->phase = Phase::kHead;
    c->head_scanned = 0;
  }

  Step Parse(Conn* c) {
    std::string& in = c->in;
    for (;;) {
      switch (c->phase) {
        case Phase::kHead: {
          size_t skip = 0;  // Empty lines before a request line are ignored (RFC 9112, 2.2).
          while (skip + 1 < in.size() && in[skip] == '\r' && in[skip + 1] == '\n') skip += 2;
          if (skip > 0) in.erase(0, skip);
          const size_t from = c->head_scanned > 3 ? c->head_scanned - 3 : 0;
          const size_t end = in.find("\r\n\r\n", from);
          if (end == std::string::npos || end + 4 > kMaxHeadBytes) {
            c->head_scanned = in.size();
            if (in.size() <= kMaxHeadBytes) return Step{};
            const size_t line_end = in.find("\r\n");
            if (line_end == std::string::npos || line_end > kMaxTargetBytes) {
              return Refuse(414, "the request target is longer than " +
                                     std::to_string(kMaxTargetBytes) + " bytes");
            }
            return Refuse(431, "the request's header fields are longer than " +
                                   std::to_string(kMaxHeadBytes) + " bytes");
          }
          Step step = ParseHead(c, std::string_view(in.data(), end));
          in.erase(0, end + 4);
          if (step.kind == Step::kRefuse) return step;
          if (c->phase == Phase::kHead) return Ready();  // No body.
          break;
        }
        case Phase::kBody: {
          const size_t take = static_cast<size_t>(std::min<uint64_t>(c->remaining, in.size()));
          c->body.append(in, 0, take);
          in.erase(0, take);
          c->remaining -= take;
          if (c->remaining > 0) return Step{};
          return Ready();
        }
        case Phase::kChunkSize: {
          const size_t line_end = in.find("\r\n");
          if (line_end == std::string::npos) {
            if (in.size() > kMaxChunkLineBytes) return Refuse(400, "a chunk-size line is too long");
            return Step{};
          }
          uint64_t size = 0;
          size_t i = 0;
          for (; i < line_end && HexValue(in[i]) >= 0; ++i) {
            if (i >= 15) return Refuse(400, "a chunk is too large");
            size = size * 16 + static_cast<uint64_t>(HexValue(in[i]));
          }
          const std::string_view rest =
              TrimWhitespace(std::string_view(in).substr(i, line_end - i));
          if (i == 0 || (!rest.empty() && rest.front() != ';')) {
            return Refuse(400, "malformed chunk-size line in the chunked body");
          }
          in.erase(0, line_end + 2);
          if (size == 0) {
            c->phase = Phase::kTrailers;
            break;
          }
          const size_t limit = static_cast<size_t>(options.body_limit);
          if (!c->over_limit && size > limit - std::min(limit, c->body.size())) {
            c->over_limit = true;
            std::string().swap(c->body);
          }
          c->remaining = size;
          c->phase = Phase::kChunkData;
          break;
        }
        case Phase::kChunkData: {
          const size_t take = static_cast<size_t>(std::min<uint64_t>(c->remaining, in.size()));
          if (!c->over_limit) c->body.append(in, 0, take);
          in.erase(0, take);
          c->remaining -= take;
          if (c->remaining > 0) return Step{};
          c->phase = Phase::kChunkEnd;
          break;
        }
        case Phase::kChunkEnd: {
          if (in.size() < 2) return Step{};
          if (in[0] != '\r' || in[1] != '\n') return Refuse(400, "a chunk does not end in CRLF");
          in.erase(0, 2);
          c->phase = Phase::kChunkSize;
          break;
        }
        case Phase::kTrailers: {
          const size_t line_end = in.find("\r\n");
          if (line_end == std::string::npos) {
            if (in.size() > kMaxHeadBytes) return Refuse(400, "the trailer section is too long");
            return Step{};
          }
          in.erase(0, line_end + 2);
          if (line_end > 0) {  // Trailer fields are read and not used.
            c->trailer_bytes += line_end + 2;
            if (c->trailer_bytes > kMaxHeadBytes) {
              return Refuse(400, "the trailer section is too long");
            }
            break;
          }
          if (c->over_limit) return Refuse(413, "the request body is over the limit", true);
          return Ready();
        }
        case Phase::kLinger:
          in.clear();
          return Step{};
      }
    }
  }

  // Fills c->req from the head (request line and fields, without the final empty line) and
  // sets the body's framing.
  Step ParseHead(Conn* c, std::string_view head) {
    httplib::Request& req = c->req;
    const size_t line_end = std::min(head.find("\r\n"), head.size());
    const std::string_view line = head.substr(0, line_end);
    const size_t sp1 = line.find(' ');
    const size_t sp2 = sp1 == std::string_view::npos ? sp1 : line.find(' ', sp1 + 1);
    if (sp2 == std::string_view::npos || line.find(' ', sp2 + 1) != std::string_view::npos) {
      return Refuse(400, "the request line is not 'METHOD target HTTP/1.1'");
    }
    const std::string_view method = line.substr(0, sp1);
    std::string_view target = line.substr(sp1 + 1, sp2 - sp1 - 1);
    const std::string_view version = line.substr(sp2 + 1);
    if (!IsToken(method)) return Refuse(400, "the request method is not a token");
    req.method = std::string(method);
    if (version != "HTTP/1.1" && version != "HTTP/1.0") {
      if (version.size() == 8 && version.substr(0, 5) == "HTTP/") {
        return Refuse(505, "only HTTP/1.0 and HTTP/1.1 are served");
      }
      return Refuse(400, "the request line does not end in an HTTP version");
    }
    req.version = std::string(version);
    if (target.size() > kMaxTargetBytes) {
      return Refuse(
          414, "the request target is longer than " + std::to_string(kMaxTargetBytes) + " bytes");
    }
    for (std::string_view scheme : {"http://", "https://"}) {  // Absolute form.
      if (target.size() >= scheme.size() &&
          EqualsIgnoreCase(target.substr(0, scheme.size()), scheme)) {
        const size_t slash = target.find('/', scheme.size());
        target = slash == std::string_view::npos ? std::string_view("/") : target.substr(slash);
      }
    }
    if (target.empty() || (target.front() != '/' && target != "*")) {
      return Refuse(400, "the request target is not a path");
    }
    req.target = std::string(target);
    const size_t question = target.find('?');
    req.path = Decode(target.substr(0, question), false);
    if (question != std::string_view::npos) ParseQuery(target.substr(question + 1), req.params);

    size_t fields = 0;
    std::string_view rest = line_end < head.size() ? head.substr(line_end + 2) : std::string_view();
    while (!rest.empty()) {
      const size_t end = std::min(rest.find("\r\n"), rest.size());
      const std::string_view field = rest.substr(0, end);
      rest = end < rest.size() ? rest.substr(end + 2) : std::string_view();
      if (++fields > kMaxHeaderFields) {
        return Refuse(431, "more than " + std::to_string(kMaxHeaderFields) + " header fields");
      }
      const size_t colon = field.find(':');
      if (colon == std::string_view::npos || !IsToken(field.substr(0, colon)) ||
          field.find_first_of(std::string_view("\r\n\0", 3)) != std::string_view::npos) {
        return Refuse(400, "malformed header field");
      }
      req.headers.emplace(std::string(field.substr(0, colon)),
                          std::string(TrimWhitespace(field.substr(colon + 1))));
    }

    const std::string connection = req.get_header_value("Connection");
    c->keep_alive = req.version == "HTTP/1.1" ? !ListsToken(connection, "close")
                                              : ListsToken(connection, "keep-alive");
    const bool chunked_field = req.has_header("Transfer-Encoding");
    const size_t lengths = req.get_header_value_count("Content-Length");
    uint64_t length = 0;
    if (chunked_field) {
      if (lengths > 0) {
        c->keep_alive = false;
        return Refuse(400, "both Content-Length and Transfer-Encoding are given");
      }
      if (req.get_header_value_count("Transfer-Encoding") != 1 ||
          !EqualsIgnoreCase(TrimWhitespace(req.get_header_value("Transfer-Encoding")), "chunked")) {
        c->keep_alive = false;
        return Refuse(501, "only the chunked transfer coding is served");
      }
      c->phase = Phase::kChunkSize;
    } else if (lengths > 0) {
      const std::string first = req.get_header_value("Content-Length");
      for (size_t i = 0; i < lengths; ++i) {
        const std::string value = req.get_header_value("Content-Length", i);
        if (value != first || value.empty() || value.size() > 18 ||
            !std::all_of(value.begin(), value.end(),
                         [](char ch) { return ch >= '0' && ch <= '9'; })) {
          c->keep_alive = false;
          return Refuse(400, "invalid Content-Length");
        }
      }
      length = std::stoull(first);
      if (length > static_cast<uint64_t>(options.body_limit)) {
        c->keep_alive = false;
        return Refuse(413, "the request body is over the limit");
      }
      if (length > 0) c->phase = Phase::kBody;
    }
    c->remaining = length;
    if (c->phase != Phase::kHead) {
      if (length > 0) {
        // Address space only: pages cost memory when the body fills them. A length the
        // process cannot even reserve is read with growth instead.
        try {
          c->body.reserve(static_cast<size_t>(length));
        } catch (const std::bad_alloc&) {
        }
      }
      if (EqualsIgnoreCase(TrimWhitespace(req.get_header_value("Expect")), "100-continue")) {
        // Left pending like an answer: ServeConnection() writes it before reading on.
        c->out_head = "HTTP/1.1 100 Continue\r\n\r\n";
        c->out_sent = 0;
      }
    }
    return Step{};
  }

  enum class Flushed { kDone, kPending, kFailed };

  // Writes as much of the pending answer as the socket takes now.
  Flushed Flush(Conn* c) {
    for (;;) {
      const size_t head = c->out_head.size();
      const size_t total = head + c->out_body.size();
      if (c->out_sent >= total) break;
      iovec parts[2];
      int count = 0;
      if (c->out_sent < head) {
        parts[count++] = {c->out_head.data() + c->out_sent, head - c->out_sent};
        parts[count++] = {c->out_body.data(), c->out_body.size()};
      } else {
        parts[count++] = {c->out_body.data() + (c->out_sent - head), total - c->out_sent};
      }
      const ssize_t n = Send(c->fd, parts, count);
      if (n < 0) {
        return errno == EAGAIN || errno == EWOULDBLOCK ? Flushed::kPending : Flushed::kFailed;
      }
      c->out_sent += static_cast<size_t>(n);
      c->last_active_ms = NowMs();
    }
    std::string().swap(c->out_head);
    if (c->stream) {
      c->out_body.clear();  // Its capacity takes the next piece.
    } else {
      std::string().swap(c->out_body);
    }
    c->out_sent = 0;
    return Flushed::kDone;
  }

  // Makes `res` the answer to c->req, left pending for Flush(); a streamed answer's body (a
  // content provider) is asked for a piece at a time by Produce(), once the head and each
  // piece before are written. (A resource releaser of `res` would run as `res` goes, before
  // the stream ends; no route sets one.)
  void WriteResponse(Conn* c, httplib::Response& res) {
    const bool head_only = c->req.method == "HEAD";
    const bool bodiless = res.status == 204 || res.status == 304 || res.status < 200;
    const bool streamed = static_cast<bool>(res.content_provider_) && !bodiless;
    // HTTP/1.0 has no chunked coding: a streamed answer ends when the connection closes.
    if (streamed && c->req.version == "HTTP/1.0") c->keep_alive = false;
    std::string head = "HTTP/1.1 " + std::to_string(res.status) + " " + Reason(res.status) + "\r\n";
    for (const auto& [name, value] : res.headers) {
      if (EqualsIgnoreCase(name, "Content-Length") || EqualsIgnoreCase(name, "Connection") ||
          EqualsIgnoreCase(name, "Transfer-Encoding")) {
        continue;
      }
      head += name + ": " + value + "\r\n";
    }
    if (!c->keep_alive) {
      head += "Connection: close\r\n";
    } else if (c->req.version == "HTTP/1.0") {
      head += "Connection: keep-alive\r\n";
    }
    if (!streamed) {
      if (!bodiless) head += "Content-Length: " + std::to_string(res.body.size()) + "\r\n";
      head += "\r\n";
      c->out_head = std::move(head);
      if (!head_only && !bodiless) c->out_body = std::move(res.body);
      c->out_sent = 0;
      return;
    }
    c->stream_chunked = c->req.version == "HTTP/1.1";
    if (c->stream_chunked) head += "Transfer-Encoding: chunked\r\n";
    head += "\r\n";
    c->out_head = std::move(head);
    c->out_sent = 0;
    if (!head_only) {
      c->stream = std::move(res.content_provider_);
      c->stream_offset = 0;
    }
  }

  // Asks the streamed answer for its next piece and leaves it pending for Flush(), framed
  // as a chunk (and the last chunk once the answer is done). False iff the answer failed:
  // it is cut short, and the connection must close so that the client sees that.
  bool Produce(Conn* c) {
    bool done = false;
    size_t produced = 0;
    httplib::DataSink sink;
    sink.write = [&](const char* data, size_t size) {
      if (done) return false;
      if (size == 0) return true;
      if (c->stream_chunked) {
        char frame[32];
        const int length = std::snprintf(frame, sizeof frame, "%zx\r\n", size);
        c->out_body.append(frame, static_cast<size_t>(length));
      }
      c->out_body.append(data, size);
      if (c->stream_chunked) c->out_body += "\r\n";
      produced += size;
      return true;
    };
    sink.done = [&] {
      if (!done && c->stream_chunked) c->out_body += "0\r\n\r\n";
      done = true;
    };
    sink.is_writable = [] { return true; };
    bool ok = false;
    try {
      ok = c->stream(c->stream_offset, 0, sink);
    } catch (const std::exception& e) {
      spdlog::error("http: a streamed answer threw: {}", e.what());
    } catch (...) {
      spdlog::error("http: a streamed answer threw");
    }
    c->stream_offset += produced;
    // A piece that neither carries data nor ends the answer would be asked for forever.
    if (!ok || (produced == 0 && !done)) {
      c->stream = nullptr;
      std::string().swap(c->out_body);
      return false;
    }
    if (done) c->stream = nullptr;
    return true;
  }

  // Runs the handler on the complete request and leaves its answer pending.
  void Answer(Conn* c) {
    httplib::Response res;
    try {
      handler(c->req, std::move(c->body), res);
    } catch (const std::exception& e) {
      spdlog::error("http: the handler of {} {} threw: {}", c->req.method, c->req.path, e.what());
      res = httplib::Response();
      res.status = 500;
    }
    if (res.status == -1) res.status = 200;
    Reply(c, res);
  }

  void AnswerRefusal(Conn* c, const Step& step) {
    if (!step.keep) c->keep_alive = false;
    httplib::Response res;
    res.status = step.status;
    refusal(c->req, step.status, step.reason, res);
    Reply(c, res);
  }

  // Leaves the answer pending, then makes the connection ready for its next request; one
  // not kept is closed once its answer is out.
  void Reply(Conn* c, httplib::Response& res) {
    WriteResponse(c, res);
    c->close_after_output = !c->keep_alive;
    ResetRequest(c);
  }

  TransportOptions options;
  RequestHandler handler;
  RefusalHandler refusal;
  int listen_fd = -1;
  int epoll_fd = -1;
  int wake_fd = -1;
  int bound_port = -1;
  char listen_tag = 0;
  char wake_tag = 0;
  std::atomic<bool> stopping{false};
  std::mutex stop_mu;
  std::condition_variable stop_cv;
  std::mutex conns_mu;
  std::unordered_map<Conn*, std::unique_ptr<Conn>> conns;
  std::mutex large_mu;  // Guards large_queue.
  std::condition_variable large_cv;
  std::deque<Conn*> large_queue;  // Complete requests with large bodies, owned (busy).
};

HttpTransport::HttpTransport(TransportOptions options, RequestHandler handler,
                             RefusalHandler refusal)
    : impl_(std::make_unique<Impl>(std::move(options), std::move(handler), std::move(refusal))) {}

HttpTransport::~HttpTransport() = default;

Status HttpTransport::Bind() { return impl_->Bind(); }

int HttpTransport::port() const { return impl_->bound_port; }

void HttpTransport::Serve() { impl_->Serve(); }

void HttpTransport::Stop() { impl_->Stop(); }

}  // namespace mdp::server
