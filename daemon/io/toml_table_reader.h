// Typed reads out of one TOML table (toml11) that remember which keys were
// read, so that unknown keys can be refused afterwards: the config file and
// the calibration manifest both use it.
#pragma once

#include <set>
#include <string>

#include <fmt/format.h>
#include <toml.hpp>

namespace slopecast::io {

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
  void number(const char* key, double& out, double min) {
    const toml::value* v = find(key);
    if (!v || !error.empty()) return;
    if (v->is_integer()) out = static_cast<double>(v->as_integer());
    else if (v->is_floating()) out = v->as_floating();
    else return fail(key, "expected a number");
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
