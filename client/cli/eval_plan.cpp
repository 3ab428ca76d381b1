#include "client/cli/eval_plan.h"

#include <algorithm>
#include <cmath>
#include <fstream>
#include <sstream>

#include <fmt/format.h>

#include "daemon/io/toml_table_reader.h"

namespace slopecast::cli {

namespace {

// One TOML scalar as a centroider option value; nullopt for other kinds.
std::optional<core::OptionValue> option_value(const toml::value& v) {
  if (v.is_floating()) return core::OptionValue(v.as_floating());
  if (v.is_integer()) return core::OptionValue(static_cast<double>(v.as_integer()));
  if (v.is_boolean()) return core::OptionValue(v.as_boolean());
  if (v.is_string()) return core::OptionValue(v.as_string().str);
  return std::nullopt;
}

}  // namespace

std::variant<std::vector<eval::Candidate>, std::string> parse_eval_plan(const std::string& text,
                                                                       const std::string& source,
                                                                       const core::CentroiderSettings& base) {
  auto fail = [&](const std::string& why) { return fmt::format("{}: {}", source, why); };
  auto parsed = io::parse_toml_text(text, source);
  if (auto* e = std::get_if<std::string>(&parsed)) return *e;
  const toml::value& root = std::get<toml::value>(parsed);
  for (const auto& [key, value] : root.as_table())
    if (key != "candidate" || !value.is_array())
      return fail(fmt::format("unknown table or key '{}': a plan holds [[candidate]] tables only", key));
  std::vector<eval::Candidate> out;
  const auto& table = root.as_table();
  const auto it = table.find("candidate");
  if (it == table.end()) return fail("no [[candidate]] table");
  int number = 0;
  for (const auto& c : it->second.as_array()) {
    ++number;
    if (!c.is_table()) return fail(fmt::format("candidate {} is not a table", number));
    std::vector<eval::SweptOption> options;
    std::string label;
    // toml11 keeps a table's keys unordered: take them alphabetically, so
    // that a plan always expands in the same order.
    std::vector<std::string> keys;
    for (const auto& [key, value] : c.as_table()) keys.push_back(key);
    std::sort(keys.begin(), keys.end());
    for (const auto& key : keys) {
      const toml::value& value = c.as_table().at(key);
      if (key == "label") {
        if (!value.is_string()) return fail(fmt::format("candidate {}: label must be a string", number));
        label = value.as_string().str;
        continue;
      }
      eval::SweptOption o{key, {}};
      if (value.is_array()) {
        for (const auto& v : value.as_array()) {
          auto ov = option_value(v);
          if (!ov) return fail(fmt::format("candidate {}: {}: a list holds numbers, true/false or text", number, key));
          o.second.push_back(*ov);
        }
      } else {
        auto ov = option_value(value);
        if (!ov) return fail(fmt::format("candidate {}: {}: expected a number, true/false, text or a list", number, key));
        o.second.push_back(*ov);
      }
      // The method first, so that a label reads "wcog weight_sigma_px=2".
      if (key == "method") options.insert(options.begin(), std::move(o));
      else options.push_back(std::move(o));
    }
    auto made = eval::expand_candidates(options, base, label);
    if (auto* e = std::get_if<std::string>(&made)) return fail(fmt::format("candidate {}: {}", number, *e));
    for (auto& cand : std::get<std::vector<eval::Candidate>>(made)) out.push_back(std::move(cand));
  }
  return out;
}

std::variant<std::vector<eval::Candidate>, std::string> read_eval_plan(const std::string& path,
                                                                      const core::CentroiderSettings& base) {
  std::ifstream in(path);
  if (!in) return fmt::format("cannot read plan '{}'", path);
  std::stringstream text;
  text << in.rdbuf();
  return parse_eval_plan(text.str(), path, base);
}

}  // namespace slopecast::cli
