// The centroider configurations an evaluation compares ("candidates"), and
// the sweeps that make several of them from one line.
//
// A candidate is a method plus centroider options, exactly the keys of the
// daemon's [centroider] table (daemon/core/centroid/centroider_settings.h),
// checked by the same apply_option(). A sweep gives an option several
// values; every combination of the listed values becomes one candidate
// (the last option varies fastest: options in the order typed on the
// command line, alphabetically in a plan file, the method first).
//
// On the command line:   "tcog threshold=0.1,0.2,0.3"
//                        "correlation correlation_metric=sdf,adf2 peak_interpolation=parabola,quadratic_ls"
// In a plan file (TOML; read by client/cli/eval_plan.h):
//   [[candidate]]
//   method = "wcog"
//   weight_sigma_px = [1.0, 1.5, 2.0]   # a list sweeps
//   label = "wcog-narrow"               # optional; with a sweep, the values are appended
#pragma once

#include <string>
#include <utility>
#include <variant>
#include <vector>

#include "daemon/core/centroid/centroider_settings.h"

namespace slopecast::eval {

struct Candidate {
  std::string label;  // unique within a plan: "tcog threshold=0.2"
  // The options as given (method first), for the report and for rebuilding.
  std::vector<std::pair<std::string, core::OptionValue>> options;
  core::CentroiderSettings settings;
};

// One option with its values (one value: no sweep).
using SweptOption = std::pair<std::string, std::vector<core::OptionValue>>;

// Every combination of the values, applied on top of `base` (the config's
// centroider, whose other options stay). `label` names them (empty: the
// method and the options given). Returns a sentence on a bad key or value.
std::variant<std::vector<Candidate>, std::string> expand_candidates(const std::vector<SweptOption>& options,
                                                                   const core::CentroiderSettings& base,
                                                                   const std::string& label = {});

// "tcog threshold=0.1,0.2": a method (or method=...) then key=value[,value...].
std::variant<std::vector<Candidate>, std::string> parse_candidate_text(const std::string& text,
                                                                      const core::CentroiderSettings& base);

// Labels must be unique: a sentence naming the first repeated one, or empty.
std::string check_labels(const std::vector<Candidate>& candidates);

}  // namespace slopecast::eval
