// ZeroMQ endpoint strings: one check for the daemon's config and every
// `slopecast` command, so a mistake gets the same sentence everywhere.
//
// Accepted: tcp://HOST:PORT (HOST a name, an IPv4 address, [IPv6] or * for
// "every interface" when binding; PORT 1..65535), ipc://PATH, inproc://NAME.
#pragma once

#include <string>
#include <vector>

namespace slopecast::io {

// Default endpoints. The block 10140-10142 lies in 10130-10159, which the
// IANA service name and port number registry lists as unassigned (read in a
// copy of the registry's CSV; re-check before relying on it on a shared
// network). All three stay together.
inline constexpr const char* kDefaultFramesEndpoint = "tcp://127.0.0.1:10140";
inline constexpr const char* kDefaultMeasurementsEndpoint = "tcp://127.0.0.1:10141";
inline constexpr const char* kDefaultControlEndpoint = "tcp://127.0.0.1:10142";
inline constexpr const char* kDefaultInsightEndpoint = "tcp://127.0.0.1:10143";

// Empty when endpoint is well formed; otherwise a sentence naming it.
std::string validate_endpoint(const std::string& endpoint);

// Things that are legal but probably wrong: a tcp host name that does not
// resolve on this machine. Resolves names (may block briefly on DNS); call it
// at start-up, never per frame.
std::vector<std::string> endpoint_warnings(const std::string& endpoint);

// True for tcp:// endpoints that other hosts could reach (not loopback).
bool reachable_off_host(const std::string& endpoint);

}  // namespace slopecast::io
