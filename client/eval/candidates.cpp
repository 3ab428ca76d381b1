#include "client/eval/candidates.h"

#include <set>
#include <sstream>

#include <fmt/format.h>

namespace slopecast::eval {

namespace {

std::string value_text(const core::OptionValue& v) {
  if (const auto* s = std::get_if<std::string>(&v)) return *s;
  return core::format_option(v);
}

}  // namespace

std::variant<std::vector<Candidate>, std::string> expand_candidates(const std::vector<SweptOption>& options,
                                                                   const core::CentroiderSettings& base,
                                                                   const std::string& label) {
  std::size_t combinations = 1;
  for (const auto& [key, values] : options) {
    if (values.empty()) return fmt::format("{}: no value given", key);
    combinations *= values.size();
    if (combinations > 10000) return "more than 10 000 combinations: split the sweep";
  }
  std::vector<Candidate> out;
  for (std::size_t c = 0; c < combinations; ++c) {
    Candidate cand;
    cand.settings = base;
    std::string swept;  // the values that vary, for the label
    std::string all;    // every option after the method, for an automatic label
    std::size_t rest = c;
    std::vector<std::size_t> pick(options.size());
    for (std::size_t i = options.size(); i-- > 0;) {
      pick[i] = rest % options[i].second.size();
      rest /= options[i].second.size();
    }
    std::string method;
    for (std::size_t i = 0; i < options.size(); ++i) {
      const auto& [key, values] = options[i];
      const core::OptionValue& v = values[pick[i]];
      if (auto e = core::apply_option(cand.settings, key, v); !e.empty()) return e;
      cand.options.emplace_back(key, v);
      if (key == "method") {
        method = value_text(v);
        continue;
      }
      all += fmt::format(" {}={}", key, value_text(v));
      if (values.size() > 1) swept += fmt::format(" {}={}", key, value_text(v));
    }
    if (method.empty()) method = std::string(core::centroider_name(cand.settings.kind));
    cand.label = label.empty() ? method + all : label + swept;
    out.push_back(std::move(cand));
  }
  return out;
}

std::variant<std::vector<Candidate>, std::string> parse_candidate_text(const std::string& text,
                                                                      const core::CentroiderSettings& base) {
  std::istringstream in(text);
  std::string word;
  std::vector<SweptOption> options;
  bool first = true;
  while (in >> word) {
    if (first && word.find('=') == std::string::npos) {
      options.push_back({"method", {core::OptionValue(word)}});
      first = false;
      continue;
    }
    first = false;
    const auto eq = word.find('=');
    if (eq == std::string::npos || eq == 0)
      return fmt::format("'{}': expected key=value (or key=v1,v2,... to sweep), e.g. weight_sigma_px=1.5,2", word);
    SweptOption o{word.substr(0, eq), {}};
    std::string_view values(word);
    values.remove_prefix(eq + 1);
    for (;;) {
      const auto comma = values.find(',');
      o.second.push_back(core::parse_option_value(values.substr(0, comma)));
      if (comma == std::string_view::npos) break;
      values.remove_prefix(comma + 1);
    }
    options.push_back(std::move(o));
  }
  if (options.empty()) return std::string("an empty candidate: give a method, e.g. \"wcog weight_sigma_px=2\"");
  auto made = expand_candidates(options, base);
  if (auto* e = std::get_if<std::string>(&made)) return fmt::format("candidate \"{}\": {}", text, *e);
  return made;
}

std::string check_labels(const std::vector<Candidate>& candidates) {
  std::set<std::string> seen;
  for (const auto& c : candidates)
    if (!seen.insert(c.label).second)
      return fmt::format("two candidates are both labelled \"{}\": give one a different label or different options",
                         c.label);
  return {};
}

}  // namespace slopecast::eval
