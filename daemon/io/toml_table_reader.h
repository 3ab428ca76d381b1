// Typed reads out of one TOML table (toml11) that remember which keys were
// read, so that unknown keys can be refused afterwards: the config file and
// the calibration manifest both use it.
#pragma once

#include <cmath>
#include <cstdint>
#include <map>
#include <set>
#include <sstream>
#include <string>
#include <variant>

#include <fmt/format.h>
#include <toml.hpp>

namespace slopecast::io {

// The parser recurses once per level of nested arrays or inline tables, so
// a file nested thousands deep overflows its stack. Checked before parsing:
// at most kMaxTomlBytes of text and kMaxTomlNesting levels of [ and {
// (counted outside strings and comments). Empty when fine, else why not.
inline constexpr std::size_t kMaxTomlBytes = 1 << 20;
inline constexpr int kMaxTomlNesting = 32;
//
// Also checked: the text is UTF-8 without control characters other than
// tab, line feed and carriage return (the TOML specification's own rule for
// a document). toml11 3.7 reads past the end of its buffer on some invalid
// UTF-8 in a literal-string key (found by fuzzing; tests/fuzz/layout_fuzz).
inline std::string check_toml_shape(const std::string& text) {
  if (text.size() > kMaxTomlBytes)
    return fmt::format("the file is {} bytes; a config or manifest is at most {} bytes", text.size(), kMaxTomlBytes);
  {
    int line = 1;
    for (std::size_t i = 0; i < text.size();) {
      const auto c = static_cast<unsigned char>(text[i]);
      if (c == '\n') ++line;
      if (c < 0x80) {
        if ((c < 0x20 && c != '\t' && c != '\n' && c != '\r') || c == 0x7f)
          return fmt::format("line {}: control character 0x{:02x} (TOML allows only tab and line ends)", line, c);
        ++i;
        continue;
      }
      // Multi-byte UTF-8: a lead byte and 1-3 continuation bytes, shortest
      // form, no surrogates, at most U+10FFFF.
      const int n = c >= 0xf0 && c <= 0xf4 ? 3 : c >= 0xe0 && c <= 0xef ? 2 : c >= 0xc2 && c <= 0xdf ? 1 : -1;
      bool ok = n > 0 && i + n < text.size();  // the continuation bytes are all there
      std::uint32_t cp = n == 1 ? c & 0x1f : n == 2 ? c & 0x0f : c & 0x07;
      for (int k = 1; ok && k <= n; ++k) {
        const auto cc = static_cast<unsigned char>(text[i + k]);
        ok = (cc & 0xc0) == 0x80;
        cp = (cp << 6) | (cc & 0x3f);
      }
      ok = ok && !(n == 2 && cp < 0x800) && !(n == 3 && (cp < 0x10000 || cp > 0x10ffff)) &&
           !(cp >= 0xd800 && cp <= 0xdfff);
      if (!ok) return fmt::format("line {}: not valid UTF-8 (a TOML file must be)", line);
      i += n + 1;
    }
  }
  int depth = 0, line = 1;
  for (std::size_t i = 0; i < text.size(); ++i) {
    const char c = text[i];
    if (c == '\n') ++line;
    if (c == '#') {  // a comment runs to the end of the line
      while (i + 1 < text.size() && text[i + 1] != '\n') ++i;
      continue;
    }
    if (c == '"' || c == '\'') {  // a string: skip it, escapes and triple quotes included
      const bool triple = text.compare(i, 3, std::string(3, c)) == 0;
      i += triple ? 3 : 1;
      for (; i < text.size(); ++i) {
        if (text[i] == '\n') ++line;
        if (c == '"' && text[i] == '\\') {
          ++i;
          continue;
        }
        if (text[i] == c && (!triple || text.compare(i, 3, std::string(3, c)) == 0)) {
          if (triple) i += 2;
          break;
        }
        if (!triple && text[i] == '\n') break;
      }
      continue;
    }
    if (c == '[' || c == '{') {
      if (++depth > kMaxTomlNesting)
        return fmt::format("line {}: arrays or inline tables nested more than {} deep", line, kMaxTomlNesting);
    } else if ((c == ']' || c == '}') && depth > 0) {
      --depth;
    }
  }
  return {};
}

// check_toml_shape() then toml11's parser: the document, or a sentence
// ("<source>: why" for a shape problem, toml11's own message, which names
// the source and line, for a syntax error).
inline std::variant<toml::value, std::string> parse_toml_text(const std::string& text, const std::string& source) {
  if (auto e = check_toml_shape(text); !e.empty()) return fmt::format("{}: {}", source, e);
  try {
    std::istringstream in(text);
    return toml::parse(in, source);
  } catch (const std::exception& e) {
    return std::string(e.what());
  }
}

// Reads typed values out of one TOML table, remembering which keys were used
// so that unknown keys can be reported afterwards.
class TableReader {
 public:
  TableReader(const toml::value* table, std::string name) : table_(table), name_(std::move(name)) {}

  std::string error;

  void integer(const char* key, int& out, long min, long max) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_integer()) return fail(key, "expected an integer");
    const long n = static_cast<long>(v->as_integer());
    if (n < min || n > max) return fail(key, fmt::format("must be {}..{}, got {}", min, max, n));
    out = static_cast<int>(n);
  }
  // Numbers beyond +-1e300 (or written as inf/nan) are refused: no setting
  // of ours means anything there, and 1e400 would otherwise arrive as the
  // largest double, silently.
  void number(const char* key, double& out, double min) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (v->is_integer()) out = static_cast<double>(v->as_integer());
    else if (v->is_floating()) out = v->as_floating();
    else return fail(key, "expected a number");
    if (!std::isfinite(out) || std::abs(out) > 1e300)
      return fail(key, fmt::format("must be a finite number of reasonable size, got {}", out));
    if (!(out >= min)) return fail(key, fmt::format("must be >= {}, got {}", min, out));
  }
  void boolean(const char* key, bool& out) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_boolean()) return fail(key, "expected true or false");
    out = v->as_boolean();
  }
  void string(const char* key, std::string& out) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_string()) return fail(key, "expected a string");
    out = v->as_string().str;
  }
  // A file path: a string that must not be empty (leave the key out for
  // "none").
  void path(const char* key, std::string& out) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (!v->is_string()) return fail(key, "expected a string (a file path)");
    out = v->as_string().str;
    if (out.empty()) return fail(key, "is an empty path; leave the key out for none");
  }
  // When set, every key any reader looks up is recorded here by table name:
  // the catalogue of accepted keys (accepted_config_keys() in
  // daemon_config.h) that the documentation is checked against.
  static std::map<std::string, std::set<std::string>>*& catalogue() {
    static std::map<std::string, std::set<std::string>>* c = nullptr;
    return c;
  }

  // After all reads: any key not read is an error.
  void reject_unknown() {
    if (!table_ || !error.empty()) return;
    for (const auto& [key, value] : table_->as_table())
      if (!used_.count(key)) {
        error = fmt::format("[{}] has an unknown key '{}'", name_, key);
        return;
      }
  }

 private:
  const toml::value* find(const char* key) {
    used_.insert(key);
    if (catalogue()) (*catalogue())[name_].insert(key);
    if (!table_) return nullptr;
    const auto& t = table_->as_table();
    auto it = t.find(key);
    return it == t.end() ? nullptr : &it->second;
  }
  void fail(const char* key, const std::string& what) {
    error = fmt::format("[{}] {}: {}", name_, key, what);
  }
  const toml::value* table_;
  std::string name_;
  std::set<std::string> used_;
};

}  // namespace slopecast::io
