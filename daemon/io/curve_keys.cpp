#include "daemon/io/curve_keys.h"

#include <sys/stat.h>

#include <cstring>
#include <fstream>
#include <sstream>

#include <fmt/format.h>
#include <toml.hpp>

#include "daemon/io/toml_table_reader.h"

namespace slopecast::io {

namespace {

constexpr const char* kZ85 =
    "0123456789abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ.-:+=^!/*?&<>()[]{}@%$#";

std::variant<toml::value, std::string> parse_file(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return fmt::format("cannot read '{}'", path.string());
  std::string text((std::istreambuf_iterator<char>(in)), {});
  if (auto e = check_toml_shape(text); !e.empty()) return fmt::format("'{}': {}", path.string(), e);
  try {
    std::istringstream stream(text);
    return toml::parse(stream, path.string());
  } catch (const std::exception& e) {
    return std::string(e.what());
  }
}

}  // namespace

bool is_z85_key(const std::string& text) {
  if (text.size() != 40) return false;
  for (char c : text)
    if (c == '\0' || !std::strchr(kZ85, c)) return false;
  return true;
}

std::variant<CurveKeyPair, std::string> read_key_file(const std::filesystem::path& path, bool need_secret) {
  auto parsed = parse_file(path);
  if (auto* e = std::get_if<std::string>(&parsed)) return *e;
  const toml::value& root = std::get<toml::value>(parsed);
  CurveKeyPair k;
  TableReader r(&root, path.string());
  r.string("public", k.public_z85);
  r.string("secret", k.secret_z85);
  r.reject_unknown();
  if (!r.error.empty()) return r.error;
  if (!is_z85_key(k.public_z85)) return fmt::format("'{}': public must be a 40-character Z85 key", path.string());
  if (!k.secret_z85.empty() && !is_z85_key(k.secret_z85))
    return fmt::format("'{}': secret must be a 40-character Z85 key", path.string());
  if (need_secret && k.secret_z85.empty()) return fmt::format("'{}' holds no secret key", path.string());
  return k;
}

std::variant<std::vector<ClientKey>, std::string> read_clients_file(const std::filesystem::path& path) {
  auto parsed = parse_file(path);
  if (auto* e = std::get_if<std::string>(&parsed)) return *e;
  const toml::value& root = std::get<toml::value>(parsed);
  std::vector<ClientKey> out;
  for (const auto& [key, value] : root.as_table()) {
    if (key != "client" || !value.is_array())
      return fmt::format("'{}': expected only [[client]] tables, found '{}'", path.string(), key);
    for (const auto& entry : value.as_array()) {
      if (!entry.is_table()) return fmt::format("'{}': each [[client]] must be a table", path.string());
      ClientKey c;
      std::string role;
      TableReader r(&entry, "client");
      r.string("name", c.name);
      r.string("public", c.public_z85);
      r.string("role", role);
      r.reject_unknown();
      if (!r.error.empty()) return fmt::format("'{}': {}", path.string(), r.error);
      if (!is_z85_key(c.public_z85))
        return fmt::format("'{}': client '{}': public must be a 40-character Z85 key", path.string(), c.name);
      if (role != "change" && role != "read")
        return fmt::format("'{}': client '{}': role must be \"change\" or \"read\", got '{}'", path.string(), c.name,
                           role);
      c.may_change = role == "change";
      out.push_back(std::move(c));
    }
  }
  return out;
}

std::string write_key_file(const std::filesystem::path& path, const CurveKeyPair& keys) {
  const std::string text =
      fmt::format("# slopecast CURVE key{}\npublic = \"{}\"\n{}", keys.secret_z85.empty() ? " (public part)" : " pair: keep it private",
                  keys.public_z85, keys.secret_z85.empty() ? "" : fmt::format("secret = \"{}\"\n", keys.secret_z85));
  const std::filesystem::path tmp = std::filesystem::path(path) += ".partial";
  {
    std::ofstream out(tmp, std::ios::trunc);
    out << text;
    if (!out) return fmt::format("cannot write '{}'", tmp.string());
  }
  if (!keys.secret_z85.empty()) chmod(tmp.c_str(), 0600);
  std::error_code ec;
  std::filesystem::rename(tmp, path, ec);
  if (ec) return fmt::format("cannot rename '{}' into place: {}", tmp.string(), ec.message());
  return {};
}

}  // namespace slopecast::io
