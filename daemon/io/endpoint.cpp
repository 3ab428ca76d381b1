#include "daemon/io/endpoint.h"

#include <netdb.h>
#include <sys/socket.h>

#include <charconv>

#include <fmt/format.h>

namespace slopecast::io {

namespace {

constexpr const char* kForms = "expected tcp://host:port, ipc://path or inproc://name";

struct TcpParts {
  std::string host;  // without [] for IPv6
  std::string port;
};

bool starts_with(const std::string& s, const char* prefix) { return s.rfind(prefix, 0) == 0; }

// Splits the part after tcp:// into host and port; false if there is no ':'.
bool split_tcp(const std::string& rest, TcpParts& out) {
  if (!rest.empty() && rest[0] == '[') {
    const auto close = rest.find(']');
    if (close == std::string::npos || close + 1 >= rest.size() || rest[close + 1] != ':') return false;
    out.host = rest.substr(1, close - 1);
    out.port = rest.substr(close + 2);
    return true;
  }
  const auto colon = rest.rfind(':');
  if (colon == std::string::npos) return false;
  out.host = rest.substr(0, colon);
  out.port = rest.substr(colon + 1);
  return true;
}

}  // namespace

std::string validate_endpoint(const std::string& e) {
  if (starts_with(e, "ipc://") || starts_with(e, "inproc://")) {
    if (e.size() == (starts_with(e, "ipc://") ? 6u : 9u))
      return fmt::format("'{}' names no path or name after the scheme ({})", e, kForms);
    return {};
  }
  if (!starts_with(e, "tcp://")) {
    if (e.find("://") == std::string::npos)
      return fmt::format("'{}' has no scheme: write tcp://{} for a TCP endpoint ({})", e, e, kForms);
    return fmt::format("'{}' is not a ZeroMQ endpoint slopecast accepts ({})", e, kForms);
  }
  TcpParts t;
  if (!split_tcp(e.substr(6), t) || t.port.empty())
    return fmt::format("'{}' has no port: write tcp://host:port with port 1..65535", e);
  if (t.host.empty()) return fmt::format("'{}' has no host before the port ({})", e, kForms);
  unsigned long port = 0;
  const auto [end, ec] = std::from_chars(t.port.data(), t.port.data() + t.port.size(), port);
  if (ec != std::errc{} || end != t.port.data() + t.port.size())
    return fmt::format("'{}': port '{}' is not a number 1..65535", e, t.port);
  if (port < 1 || port > 65535) return fmt::format("'{}': port {} is outside 1..65535", e, t.port);
  return {};
}

std::vector<std::string> endpoint_warnings(const std::string& e) {
  std::vector<std::string> out;
  TcpParts t;
  if (!starts_with(e, "tcp://") || !split_tcp(e.substr(6), t) || t.host == "*") return out;
  addrinfo hints{};
  hints.ai_socktype = SOCK_STREAM;
  addrinfo* found = nullptr;
  const int rc = getaddrinfo(t.host.c_str(), nullptr, &hints, &found);
  if (found) freeaddrinfo(found);
  if (rc != 0)
    out.push_back(fmt::format("host '{}' of '{}' does not resolve on this machine ({})", t.host, e,
                              gai_strerror(rc)));
  return out;
}

bool reachable_off_host(const std::string& endpoint) {
  if (!starts_with(endpoint, "tcp://")) return false;
  for (const char* local : {"tcp://127.", "tcp://localhost:", "tcp://[::1]:"})
    if (starts_with(endpoint, local)) return false;
  return true;
}

}  // namespace slopecast::io
