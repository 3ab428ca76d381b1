// An evaluation plan file for `slopecast eval --plan FILE`: the candidates
// to compare, one [[candidate]] table each (client/eval/candidates.h). Any
// option given as a list is swept. Unknown tables are refused; options are
// checked by the same code as the daemon's [centroider] table.
#pragma once

#include <string>
#include <variant>
#include <vector>

#include "client/eval/candidates.h"

namespace slopecast::cli {

std::variant<std::vector<eval::Candidate>, std::string> parse_eval_plan(const std::string& text,
                                                                       const std::string& source,
                                                                       const core::CentroiderSettings& base);
std::variant<std::vector<eval::Candidate>, std::string> read_eval_plan(const std::string& path,
                                                                      const core::CentroiderSettings& base);

}  // namespace slopecast::cli
