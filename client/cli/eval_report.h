// What `slopecast eval` found, and the ways it is written out: a ranked
// table on the terminal, CSV and JSON for scripts, and one self-contained
// HTML page whose plots are drawn by gnuplot (SVG, embedded as data: URIs,
// so the page needs no network and no other file).
#pragma once

#include <filesystem>
#include <map>
#include <ostream>
#include <string>
#include <utility>
#include <vector>

#include "client/eval/candidates.h"
#include "client/eval/scorecard.h"

namespace slopecast::cli {

// One setting of the light and the detector (a point of a signal sweep), or
// the whole recorded input: every candidate's summary over its frames.
struct EvalPoint {
  std::string label;                                // "photons=300 read_noise_e=3", or "all frames"
  std::vector<std::pair<std::string, double>> knobs;  // the swept values (photons, read_noise_e)
  // Theory for this point (NaN where it does not apply), rms px per axis:
  // the CoG's noise from the published formula (Rousset 1999, the pixel's
  // 1/12 included) and the Cramer-Rao bound (Winick 1986).
  double cog_theory_px = 0, cramer_rao_px = 0;
  std::vector<eval::Summary> results;  // one per candidate, in candidate order
};

struct EvalRun {
  std::string command;      // as typed
  std::string started_utc;  // ISO 8601
  std::string input_kind;   // "spots", "response", "scenario", "recording", "cube"
  // What went in: (name, fingerprint). Files carry their SHA-256; simulated
  // inputs the SHA-256 of their settings text.
  std::vector<std::pair<std::string, std::string>> inputs;
  // Every setting behind the numbers, as (key, value) text, grouped.
  std::vector<std::pair<std::string, std::vector<std::pair<std::string, std::string>>>> settings;
  std::vector<eval::Candidate> candidates;
  std::vector<EvalPoint> points;
  int n_subap_x = 0, n_subap_y = 0;
  std::string rank_by;  // rms, bias, noise, valid, time, agreement
  bool partial = false;
  std::string partial_note;  // what was cut short
  std::vector<std::string> notes;  // remarks for the reader (dark from the bias, frames refused ...)
};

// A CSV cell: quoted (quotes doubled) when it holds a comma, a quote or a
// line end.
std::string csv_field(const std::string& s);

// The figures a ranking can use.
bool known_figure(const std::string& name);
// A candidate's figure at one point (NaN when it has none).
double figure_of(const eval::Summary& s, const std::string& name);
// Candidate indices, best first, by `run.rank_by` (over several points: the
// geometric mean for error, noise and time figures, the arithmetic mean
// for the valid fraction, which ranks highest first), and each one's
// figure in `figure`.
std::vector<std::size_t> rank_candidates(const EvalRun& run, std::vector<double>& figure);

void print_table(std::ostream& out, const EvalRun& run);

// Each returns an empty string on success, otherwise why not.
std::string write_summary_csv(const std::filesystem::path& path, const EvalRun& run);
std::string write_json(const std::filesystem::path& path, const EvalRun& run);
// Draws the plots into plot_dir (SVG, kept beside the page) with gnuplot,
// then writes the page with them embedded.
std::string write_html(const std::filesystem::path& path, const std::filesystem::path& plot_dir, const EvalRun& run);

// Whether a gnuplot program is on PATH (the HTML report needs it).
bool gnuplot_available();

// SHA-256 of a file's bytes or of a text, as 64 hex digits ("" if unreadable).
std::string sha256_of_file(const std::filesystem::path& path);
std::string sha256_of_text(const std::string& text);

}  // namespace slopecast::cli
