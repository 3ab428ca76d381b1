// Keys for ZeroMQ's CURVE security (encryption and authentication of TCP
// connections, RFC 26 of the ZeroMQ project), as small TOML files of our
// own:
//
//   key file      public = "<40 Z85 characters>"
//                 secret = "<40 Z85 characters>"    (absent in a public-only copy)
//   clients file  [[client]]
//                 name   = "loop-controller"        (for logs)
//                 public = "<40 Z85 characters>"
//                 role   = "change" | "read"        (may change settings, or only look)
//
// Keys are ZeroMQ's Z85 text form of a 32-byte Curve25519 key; `slopecast
// keys NAME` makes a pair.
#pragma once

#include <filesystem>
#include <string>
#include <variant>
#include <vector>

namespace slopecast::io {

struct CurveKeyPair {
  std::string public_z85;
  std::string secret_z85;  // empty in a public-only file
};

struct ClientKey {
  std::string name;
  std::string public_z85;
  bool may_change = false;  // role "change"
};

// True for 40 characters of the Z85 alphabet (32 bytes encoded).
bool is_z85_key(const std::string& text);

// need_secret: refuse a file without one.
std::variant<CurveKeyPair, std::string> read_key_file(const std::filesystem::path& path, bool need_secret);
std::variant<std::vector<ClientKey>, std::string> read_clients_file(const std::filesystem::path& path);

// Writes a key file (with the secret: readable by the owner only).
std::string write_key_file(const std::filesystem::path& path, const CurveKeyPair& keys);

}  // namespace slopecast::io
