#include "client/cli/eval_report.h"

#include "client/lib/flag_letters.h"

#include <fcntl.h>
#include <spawn.h>
#include <sys/wait.h>
#include <unistd.h>

#include <algorithm>
#include <cerrno>
#include <cmath>
#include <fstream>
#include <limits>
#include <numeric>
#include <set>
#include <sstream>

#include <fmt/format.h>
#include <nlohmann/json.hpp>
#include <openssl/evp.h>

extern char** environ;

namespace slopecast::cli {

namespace {

constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

// The error-like figures: lower is better, averaged geometrically.
bool geometric(const std::string& name) { return name == "rms" || name == "noise" || name == "time"; }

// A number for CSV: shortest text that reads back to the same double; empty for NaN.
std::string csv_number(double v) { return std::isfinite(v) ? fmt::format("{}", v) : std::string(); }
// For people: 4 significant digits; an en dash for NaN.
std::string shown(double v) { return std::isfinite(v) ? fmt::format("{:.4g}", v) : std::string("–"); }
std::string percent(double v) { return std::isfinite(v) ? fmt::format("{:.1f}", 100 * v) : std::string("–"); }


std::string html_escape(const std::string& s) {
  std::string out;
  for (char c : s) {
    switch (c) {
      case '&': out += "&amp;"; break;
      case '<': out += "&lt;"; break;
      case '>': out += "&gt;"; break;
      case '"': out += "&quot;"; break;
      default: out += c;
    }
  }
  return out;
}

// gnuplot string literal (single quotes; a quote is doubled).
std::string gp_text(const std::string& s) {
  std::string out = "'";
  for (char c : s) out += c == '\'' ? std::string("''") : std::string(1, c);
  return out + "'";
}

std::string options_text(const eval::Candidate& c) {
  std::string out;
  for (const auto& [k, v] : c.options) {
    const auto* text = std::get_if<std::string>(&v);
    out += fmt::format("{}{}={}", out.empty() ? "" : " ", k, text ? *text : core::format_option(v));
  }
  return out.empty() ? std::string("(as configured)") : out;
}

// The summary columns shared by the CSV, the JSON and the HTML tables:
// (name, value).
std::vector<std::pair<std::string, double>> figures(const eval::Summary& s) {
  return {{"frames", static_cast<double>(s.frames)},
          {"samples", s.samples},
          {"rms_px", s.rms_px},
          {"rms_x_px", s.x.rms_px},
          {"rms_y_px", s.y.rms_px},
          {"bias_x_px", s.x.bias_px},
          {"bias_y_px", s.y.bias_px},
          {"gain_x", s.x.gain},
          {"gain_y", s.y.gain},
          {"offset_x_px", s.x.offset_px},
          {"offset_y_px", s.y.offset_px},
          {"linear_range_x_px", s.x.linear_range_px},
          {"linear_range_y_px", s.y.linear_range_px},
          {"valid_fraction", s.valid_fraction},
          {"false_reject_fraction", s.false_reject_fraction},
          {"false_accept_fraction", s.false_accept_fraction},
          {"median_noise_px", s.median_noise_px},
          {"agreement_rms_px", s.agreement_rms_px},
          {"mean_flux_adu", s.mean_flux_adu},
          {"mean_fwhm_px", s.mean_fwhm_px},
          {"median_us_per_frame", s.median_us},
          {"mean_us_per_frame", s.mean_us}};
}

std::vector<std::string> knob_names(const EvalRun& run) {
  std::vector<std::string> names;
  for (const auto& p : run.points)
    for (const auto& [k, v] : p.knobs)
      if (std::find(names.begin(), names.end(), k) == names.end()) names.push_back(k);
  return names;
}

double knob(const EvalPoint& p, const std::string& name) {
  for (const auto& [k, v] : p.knobs)
    if (k == name) return v;
  return kNaN;
}

bool any_truth(const EvalRun& run) {
  for (const auto& p : run.points)
    for (const auto& s : p.results)
      if (s.has_truth) return true;
  return false;
}

// Runs gnuplot on a script file; empty on success, else why.
std::string run_gnuplot(const std::filesystem::path& script) {
  const std::filesystem::path log = script.string() + ".log";
  posix_spawn_file_actions_t actions;
  posix_spawn_file_actions_init(&actions);
  posix_spawn_file_actions_addopen(&actions, 2, log.c_str(), O_WRONLY | O_CREAT | O_TRUNC, 0644);
  posix_spawn_file_actions_addopen(&actions, 1, "/dev/null", O_WRONLY, 0);
  std::string prog = "gnuplot", arg = script.string();
  char* argv[] = {prog.data(), arg.data(), nullptr};
  pid_t pid = 0;
  const int rc = posix_spawnp(&pid, "gnuplot", &actions, nullptr, argv, environ);
  posix_spawn_file_actions_destroy(&actions);
  if (rc != 0) return "cannot start gnuplot (Debian package gnuplot-nox)";
  int status = 0;
  while (waitpid(pid, &status, 0) < 0 && errno == EINTR) {
  }
  if (WIFEXITED(status) && WEXITSTATUS(status) == 0) {
    std::error_code ec;
    std::filesystem::remove(log, ec);
    return {};
  }
  std::ifstream in(log);
  std::stringstream said;
  said << in.rdbuf();
  return fmt::format("gnuplot failed on {}: {}", script.string(), said.str());
}

std::string base64(const std::string& bytes) {
  std::string out(4 * ((bytes.size() + 2) / 3) + 1, '\0');
  const int n = EVP_EncodeBlock(reinterpret_cast<unsigned char*>(out.data()),
                                reinterpret_cast<const unsigned char*>(bytes.data()), static_cast<int>(bytes.size()));
  out.resize(static_cast<std::size_t>(n));
  return out;
}

std::string hex_digest(EVP_MD_CTX* ctx) {
  unsigned char digest[EVP_MAX_MD_SIZE];
  unsigned int len = 0;
  EVP_DigestFinal_ex(ctx, digest, &len);
  std::string out;
  for (unsigned i = 0; i < len; ++i) out += fmt::format("{:02x}", digest[i]);
  return out;
}

const char* kPalette[] = {"#1b6ca8", "#d1495b", "#2e933c", "#edae49", "#7a4fa0", "#00798c", "#8d6a3f", "#5c5c5c"};

struct Plot {
  std::string name;     // file stem
  std::string title;    // heading on the page
  std::string caption;  // what it shows, settings behind it
};

}  // namespace

std::string csv_field(const std::string& s) {
  if (s.find_first_of(",\"\n") == std::string::npos) return s;
  std::string q = "\"";
  for (char c : s) q += c == '"' ? std::string("\"\"") : std::string(1, c);
  return q + "\"";
}

bool known_figure(const std::string& name) {
  static const std::set<std::string> k{"rms", "bias", "noise", "valid", "time", "agreement"};
  return k.count(name) > 0;
}

double figure_of(const eval::Summary& s, const std::string& name) {
  if (name == "rms") return s.rms_px;
  if (name == "bias") return std::hypot(s.x.bias_px, s.y.bias_px);
  if (name == "noise") return s.median_noise_px;
  if (name == "valid") return s.valid_fraction;
  if (name == "time") return s.median_us;
  if (name == "agreement") return s.agreement_rms_px;
  return kNaN;
}

std::vector<std::size_t> rank_candidates(const EvalRun& run, std::vector<double>& figure) {
  const std::size_t n = run.candidates.size();
  figure.assign(n, kNaN);
  for (std::size_t c = 0; c < n; ++c) {
    double sum = 0;
    int used = 0;
    bool bad = false;
    for (const auto& p : run.points) {
      if (c >= p.results.size()) continue;
      const double f = figure_of(p.results[c], run.rank_by);
      if (!std::isfinite(f) || (geometric(run.rank_by) && f <= 0)) {
        bad = true;
        continue;
      }
      sum += geometric(run.rank_by) ? std::log(f) : f;
      ++used;
    }
    if (used && !bad) figure[c] = geometric(run.rank_by) ? std::exp(sum / used) : sum / used;
  }
  std::vector<std::size_t> order(n);
  std::iota(order.begin(), order.end(), 0);
  const bool higher_better = run.rank_by == "valid";
  std::stable_sort(order.begin(), order.end(), [&](std::size_t a, std::size_t b) {
    const double fa = figure[a], fb = figure[b];
    if (!std::isfinite(fb)) return std::isfinite(fa);
    if (!std::isfinite(fa)) return false;
    return higher_better ? fa > fb : fa < fb;
  });
  return order;
}

void print_table(std::ostream& out, const EvalRun& run) {
  std::vector<double> figure;
  const auto order = rank_candidates(run, figure);
  const bool truth = any_truth(run);
  std::size_t w = 9;
  for (const auto& c : run.candidates) w = std::max(w, c.label.size());
  out << fmt::format("ranked by {}{}{}\n", run.rank_by,
                     run.points.size() > 1 ? (geometric(run.rank_by) ? " (geometric mean over the points)"
                                                                     : " (mean over the points)")
                                           : "",
                     run.partial ? "  [PARTIAL: " + run.partial_note + "]" : "");
  if (run.points.size() == 1) {
    const auto& p = run.points[0];
    if (truth) {
      out << fmt::format("{:>2}  {:<{}}  {:>8} {:>9} {:>9} {:>7} {:>7} {:>7} {:>6} {:>6} {:>6} {:>8}\n", "#", "candidate",
                         w, "rms px", "bias x", "bias y", "gain x", "gain y", "lin px", "valid%", "frej%", "facc%",
                         "us/frame");
      for (std::size_t r = 0; r < order.size(); ++r) {
        const auto& s = p.results[order[r]];
        out << fmt::format("{:>2}  {:<{}}  {:>8} {:>9} {:>9} {:>7} {:>7} {:>7} {:>6} {:>6} {:>6} {:>8}\n", r + 1,
                           run.candidates[order[r]].label, w, shown(s.rms_px), shown(s.x.bias_px), shown(s.y.bias_px),
                           shown(s.x.gain), shown(s.y.gain),
                           shown(std::min(s.x.linear_range_px, s.y.linear_range_px)), percent(s.valid_fraction),
                           percent(s.false_reject_fraction), percent(s.false_accept_fraction), shown(s.median_us));
      }
    } else {
      out << fmt::format("{:>2}  {:<{}}  {:>9} {:>9} {:>6} {:>10} {:>7} {:>8}\n", "#", "candidate", w, "noise px",
                         "vs 1st px", "valid%", "flux ADU", "fwhm px", "us/frame");
      for (std::size_t r = 0; r < order.size(); ++r) {
        const auto& s = p.results[order[r]];
        out << fmt::format("{:>2}  {:<{}}  {:>9} {:>9} {:>6} {:>10} {:>7} {:>8}\n", r + 1,
                           run.candidates[order[r]].label, w, shown(s.median_noise_px), shown(s.agreement_rms_px),
                           percent(s.valid_fraction), shown(s.mean_flux_adu), shown(s.mean_fwhm_px),
                           shown(s.median_us));
      }
    }
    return;
  }
  // A sweep: the ranking figure at every point, columns headed by the
  // swept values ("1000/3": photons / read noise).
  out << fmt::format("{:>2}  {:<{}}  {:>9}", "#", "candidate", w, "overall");
  for (const auto& p : run.points) {
    std::string head;
    for (const auto& [k, v] : p.knobs) head += fmt::format("{}{:g}", head.empty() ? "" : "/", v);
    out << fmt::format(" {:>11}", head.substr(0, 11));
  }
  out << "\n";
  bool starred = false;
  for (std::size_t r = 0; r < order.size(); ++r) {
    out << fmt::format("{:>2}  {:<{}}  {:>9}", r + 1, run.candidates[order[r]].label, w, shown(figure[order[r]]));
    for (const auto& p : run.points) {
      std::string cell = "–";
      if (order[r] < p.results.size()) {
        const auto& s = p.results[order[r]];
        cell = shown(figure_of(s, run.rank_by));
        if (s.valid_fraction < 0.99) {
          cell += "*";
          starred = true;
        }
      }
      out << fmt::format(" {:>11}", cell);
    }
    out << "\n";
  }
  if (std::isfinite(run.points[0].cog_theory_px)) {
    out << fmt::format("    {:<{}}  {:>9}", "theory: CoG (Rousset 1999)", w, "");
    for (const auto& p : run.points) out << fmt::format(" {:>11}", shown(p.cog_theory_px));
    out << fmt::format("\n    {:<{}}  {:>9}", "theory: Cramér–Rao bound", w, "");
    for (const auto& p : run.points) out << fmt::format(" {:>11}", shown(p.cramer_rao_px));
    out << "\n";
  }
  if (!run.points.empty() && !run.points[0].knobs.empty()) {
    out << "columns: ";
    for (std::size_t i = 0; i < run.points[0].knobs.size(); ++i) out << (i ? " / " : "") << run.points[0].knobs[i].first;
    out << "\n";
  }
  if (starred) out << "* fewer than 99 % of the subaperture-frames valid: the figure covers the valid ones only\n";
}

std::string write_summary_csv(const std::filesystem::path& path, const EvalRun& run) {
  std::ofstream out(path);
  if (!out) return fmt::format("cannot write '{}'", path.string());
  const auto knobs = knob_names(run);
  out << "point";
  for (const auto& k : knobs) out << "," << k;
  out << ",candidate,options";
  for (const auto& [name, v] : figures(eval::Summary{})) out << "," << name;
  out << ",cog_theory_px,cramer_rao_px,partial\n";
  for (const auto& p : run.points)
    for (std::size_t c = 0; c < p.results.size(); ++c) {
      out << csv_field(p.label);
      for (const auto& k : knobs) out << "," << csv_number(knob(p, k));
      out << "," << csv_field(run.candidates[c].label) << "," << csv_field(options_text(run.candidates[c]));
      for (const auto& [name, v] : figures(p.results[c])) out << "," << csv_number(v);
      out << "," << csv_number(p.cog_theory_px) << "," << csv_number(p.cramer_rao_px) << "," << (run.partial ? 1 : 0)
          << "\n";
    }
  out.close();
  return out ? std::string() : fmt::format("error writing '{}'", path.string());
}

std::string write_json(const std::filesystem::path& path, const EvalRun& run) {
  using json = nlohmann::ordered_json;
  auto number = [](double v) { return std::isfinite(v) ? json(v) : json(nullptr); };
  auto numbers = [&](const std::vector<double>& v) {
    json a = json::array();
    for (double x : v) a.push_back(number(x));
    return a;
  };
  json j;
  j["tool"] = "slopecast eval";
  j["command"] = run.command;
  j["started_utc"] = run.started_utc;
  j["input_kind"] = run.input_kind;
  j["partial"] = run.partial;
  j["partial_note"] = run.partial_note;
  j["inputs"] = json::array();
  for (const auto& [name, hash] : run.inputs) j["inputs"].push_back({{"name", name}, {"sha256", hash}});
  j["settings"] = json::object();
  for (const auto& [group, kv] : run.settings) {
    json g = json::object();
    for (const auto& [k, v] : kv) g[k] = v;
    j["settings"][group] = g;
  }
  j["notes"] = run.notes;
  j["n_subap_x"] = run.n_subap_x;
  j["n_subap_y"] = run.n_subap_y;
  j["candidates"] = json::array();
  for (const auto& c : run.candidates) {
    json o = json::object();
    for (const auto& [k, v] : c.options) {
      if (const auto* d = std::get_if<double>(&v)) o[k] = *d;
      else if (const auto* b = std::get_if<bool>(&v)) o[k] = *b;
      else o[k] = std::get<std::string>(v);
    }
    j["candidates"].push_back({{"label", c.label}, {"options", o}, {"describe", core::describe(c.settings)}});
  }
  std::vector<double> figure;
  const auto order = rank_candidates(run, figure);
  j["rank_by"] = run.rank_by;
  j["ranking"] = json::array();
  for (std::size_t r = 0; r < order.size(); ++r)
    j["ranking"].push_back({{"rank", r + 1}, {"candidate", run.candidates[order[r]].label}, {"figure", number(figure[order[r]])}});
  j["points"] = json::array();
  for (const auto& p : run.points) {
    json jp;
    jp["label"] = p.label;
    jp["knobs"] = json::object();
    for (const auto& [k, v] : p.knobs) jp["knobs"][k] = v;
    jp["cog_theory_px"] = number(p.cog_theory_px);
    jp["cramer_rao_px"] = number(p.cramer_rao_px);
    jp["results"] = json::array();
    for (std::size_t c = 0; c < p.results.size(); ++c) {
      const auto& s = p.results[c];
      json r;
      r["candidate"] = run.candidates[c].label;
      for (const auto& [name, v] : figures(s)) r[name] = number(v);
      r["rms_by_subaperture_px"] = numbers(s.rms_by_subaperture_px);
      r["noise_by_subaperture_px"] = numbers(s.noise_by_subaperture_px);
      json flux = json::array();
      for (const auto& b : s.by_flux)
        flux.push_back({{"flux_lo_adu", b.flux_lo_adu}, {"flux_hi_adu", b.flux_hi_adu}, {"samples", b.samples},
                        {"rms_error_px", number(b.rms_error_px)}});
      r["by_flux"] = flux;
      for (const auto* axis : {"x", "y"}) {
        json resp = json::array();
        for (const auto& q : axis[0] == 'x' ? s.response_x : s.response_y)
          resp.push_back({{"true_px", q.true_px}, {"measured_px", q.measured_px}, {"rms_error_px", q.rms_error_px},
                          {"samples", q.samples}});
        r[std::string("response_") + axis] = resp;
      }
      json reasons = json::object();
      for (const auto& [bit, count] : s.invalid_reasons) reasons[fmt::format("{}", bit)] = count;
      r["invalid_reasons_by_flag_bit"] = reasons;
      jp["results"].push_back(r);
    }
    j["points"].push_back(jp);
  }
  std::ofstream out(path);
  if (!out) return fmt::format("cannot write '{}'", path.string());
  out << j.dump(1) << "\n";
  out.close();
  return out ? std::string() : fmt::format("error writing '{}'", path.string());
}

bool gnuplot_available() {
  const char* path = std::getenv("PATH");
  if (!path) return false;
  std::stringstream dirs(path);
  for (std::string d; std::getline(dirs, d, ':');)
    if (!d.empty() && ::access((std::filesystem::path(d) / "gnuplot").c_str(), X_OK) == 0) return true;
  return false;
}

std::string sha256_of_text(const std::string& text) {
  EVP_MD_CTX* ctx = EVP_MD_CTX_new();
  EVP_DigestInit_ex(ctx, EVP_sha256(), nullptr);
  EVP_DigestUpdate(ctx, text.data(), text.size());
  std::string out = hex_digest(ctx);
  EVP_MD_CTX_free(ctx);
  return out;
}

std::string sha256_of_file(const std::filesystem::path& path) {
  std::ifstream in(path, std::ios::binary);
  if (!in) return {};
  EVP_MD_CTX* ctx = EVP_MD_CTX_new();
  EVP_DigestInit_ex(ctx, EVP_sha256(), nullptr);
  std::vector<char> buf(1 << 20);
  while (in) {
    in.read(buf.data(), static_cast<std::streamsize>(buf.size()));
    EVP_DigestUpdate(ctx, buf.data(), static_cast<std::size_t>(in.gcount()));
  }
  std::string out = hex_digest(ctx);
  EVP_MD_CTX_free(ctx);
  return out;
}

std::string write_html(const std::filesystem::path& path, const std::filesystem::path& plot_dir, const EvalRun& run) {
  std::error_code ec;
  std::filesystem::create_directories(plot_dir, ec);
  if (ec) return fmt::format("cannot make '{}': {}", plot_dir.string(), ec.message());
  std::vector<double> figure;
  const auto order = rank_candidates(run, figure);
  const bool truth = any_truth(run);
  const std::string input_line = [&] {
    std::string s;
    for (const auto& [name, hash] : run.inputs) s += fmt::format("{}{} (sha256 {})", s.empty() ? "" : "; ", name, hash.substr(0, 16));
    return s;
  }();
  std::vector<Plot> plots;
  const std::string head =
      "set terminal svg size 760,500 dynamic noenhanced font 'sans,11' background '#ffffff'\n"
      "set border lw 1 lc rgb '#444444'\nset grid lc rgb '#dddddd'\nset key below Left reverse box lc rgb '#bbbbbb' height 1.5\n";
  auto draw = [&](const std::string& name, const std::string& body) -> std::string {
    const auto script = plot_dir / (name + ".gp");
    std::ofstream gp(script);
    gp << head << "set output " << gp_text(std::filesystem::absolute(plot_dir / (name + ".svg")).string()) << "\n" << body;
    gp.close();
    if (!gp) return fmt::format("cannot write '{}'", script.string());
    return run_gnuplot(script);
  };
  const std::size_t shown_candidates = std::min<std::size_t>(order.size(), 8);
  // One gnuplot data block per shown candidate, best first ($<tag><rank>,
  // its "x y" rows from rows_of(candidate)), and the plot term drawing it.
  const auto candidate_lines = [&](const char* tag, double point_size, auto rows_of, std::string& body,
                                   std::string& plot_cmd) {
    for (std::size_t r = 0; r < shown_candidates; ++r) {
      const std::size_t c = order[r];
      body += fmt::format("${}{} << EOD\n", tag, r) + rows_of(c) + "EOD\n";
      plot_cmd += fmt::format("${}{} with linespoints lw 2 pt 7 ps {} lc rgb '{}' title {}, ", tag, r, point_size,
                              kPalette[r % 8], gp_text(run.candidates[c].label));
    }
  };

  // 1. Error (or noise) against the signal, with the theory lines.
  const auto knobs = knob_names(run);
  if (run.points.size() > 1 && std::find(knobs.begin(), knobs.end(), "photons") != knobs.end()) {
    std::vector<double> noise_levels;
    for (const auto& p : run.points) {
      const double r = knob(p, "read_noise_e");
      if (std::find(noise_levels.begin(), noise_levels.end(), r) == noise_levels.end()) noise_levels.push_back(r);
    }
    for (std::size_t g = 0; g < noise_levels.size(); ++g) {
      std::string body;
      std::string plot_cmd = "plot ";
      candidate_lines("c", 0.7, [&](std::size_t c) {
        std::string rows;
        for (const auto& p : run.points) {
          if (!(knob(p, "read_noise_e") == noise_levels[g] || (std::isnan(noise_levels[g]) && std::isnan(knob(p, "read_noise_e")))))
            continue;
          const double f = truth ? p.results[c].rms_px : p.results[c].median_noise_px;
          if (std::isfinite(f) && f > 0) rows += fmt::format("{} {}\n", knob(p, "photons"), f);
        }
        return rows;
      }, body, plot_cmd);
      body += "$theory << EOD\n";
      bool theory = false;
      for (const auto& p : run.points)
        if (knob(p, "read_noise_e") == noise_levels[g] && std::isfinite(p.cog_theory_px)) {
          body += fmt::format("{} {} {}\n", knob(p, "photons"), p.cog_theory_px, p.cramer_rao_px);
          theory = true;
        }
      body += "EOD\n";
      if (theory)
        plot_cmd += "$theory using 1:2 with lines dt 2 lw 2 lc rgb '#000000' title 'CoG theory (Rousset 1999)', "
                    "$theory using 1:3 with lines dt 3 lw 3 lc rgb '#000000' title 'Cramér–Rao bound (Winick 1986)', ";
      plot_cmd.resize(plot_cmd.size() - 2);
      body += "set logscale xy\nset xlabel 'photo-electrons per subaperture'\nset ylabel " +
              gp_text(truth ? "rms error per axis (px)" : "temporal noise per axis (px)") + "\n";
      body += "set title " + gp_text(std::isnan(noise_levels[g]) ? std::string("error against signal")
                                                                  : fmt::format("read noise {} e⁻", noise_levels[g])) + "\n";
      body += plot_cmd + "\n";
      const std::string name = fmt::format("signal_{}", g);
      if (auto e = draw(name, body); !e.empty()) return e;
      plots.push_back({name, std::isnan(noise_levels[g]) ? "Error against signal"
                                                           : fmt::format("Error against signal, read noise {} e⁻", noise_levels[g]),
                       "Each candidate's rms error per axis (all valid, usable subapertures; the best 8 when there "
                       "are more), the CoG's published "
                       "noise (Rousset 1999, the pixel's 1/12 px² included) and the Cramér–Rao bound for a "
                       "pixel-integrated Gaussian with read noise (Winick 1986). Input: " + input_line});
    }
  }
  // 2. Response: measured − true against true, per axis x (first point with truth).
  for (std::size_t pi = 0; pi < run.points.size() && truth; ++pi) {
    const auto& p = run.points[pi];
    if (p.results.empty() || p.results[order[0]].response_x.size() < 3) continue;
    std::string body, plot_cmd = "plot ";
    candidate_lines("r", 0.5, [&](std::size_t c) {
      std::string rows;
      for (const auto& q : p.results[c].response_x)
        if (q.samples >= 10) rows += fmt::format("{} {}\n", q.true_px, q.measured_px - q.true_px);
      return rows;
    }, body, plot_cmd);
    plot_cmd.resize(plot_cmd.size() - 2);
    body += "set xlabel 'true shift x (px)'\nset ylabel 'measured − true, x (px)'\nset title " +
            gp_text("response, " + p.label) + "\n" + plot_cmd + "\n";
    if (auto e = draw("response", body); !e.empty()) return e;
    plots.push_back({"response", "Response (x)",
                     fmt::format("Mean measured minus true slope in bins of true shift (bins of at least 10 samples; the best 8 "
                                 "candidates), {}. Input: {}",
                                 p.label, input_line)});
    break;
  }
  // 3. Error by flux level (first point with truth and more than one bin).
  for (std::size_t pi = 0; pi < run.points.size() && truth; ++pi) {
    const auto& p = run.points[pi];
    if (p.results.empty() || p.results[order[0]].by_flux.size() < 2) continue;
    std::string body, plot_cmd = "plot ";
    candidate_lines("f", 0.6, [&](std::size_t c) {
      std::string rows;
      for (const auto& b : p.results[c].by_flux)
        if (b.rms_error_px > 0) rows += fmt::format("{} {}\n", std::sqrt(b.flux_lo_adu * b.flux_hi_adu), b.rms_error_px);
      return rows;
    }, body, plot_cmd);
    plot_cmd.resize(plot_cmd.size() - 2);
    body += "set logscale xy\nset xlabel 'measured flux (ADU, bins of a factor 2)'\nset ylabel 'rms error per axis (px)'\n"
            "set title " + gp_text("error by flux, " + p.label) + "\n" + plot_cmd + "\n";
    if (auto e = draw("flux", body); !e.empty()) return e;
    plots.push_back({"flux", "Error by flux level",
                     fmt::format("rms error per axis in bins of measured flux (the best 8 candidates), {}. Input: {}", p.label,
                                 input_line)});
    break;
  }
  // 4. Maps over the pupil, best candidates first (the last point: the most light in a sweep).
  if (!run.points.empty() && run.n_subap_x > 0) {
    const auto& p = run.points.back();
    const std::size_t maps = std::min<std::size_t>(order.size(), 4);
    for (std::size_t r = 0; r < maps; ++r) {
      const std::size_t c = order[r];
      if (c >= p.results.size()) continue;
      const auto& values = truth ? p.results[c].rms_by_subaperture_px : p.results[c].noise_by_subaperture_px;
      std::string body = "$m << EOD\n";
      for (int iy = 0; iy < run.n_subap_y; ++iy) {
        for (int ix = 0; ix < run.n_subap_x; ++ix) {
          const double v = values[static_cast<std::size_t>(iy) * run.n_subap_x + ix];
          body += fmt::format("{} {} {}\n", ix, iy, std::isfinite(v) ? fmt::format("{}", v) : std::string("NaN"));
        }
        body += "\n";
      }
      body += "EOD\n";
      body += fmt::format(
          "set size ratio -1\nunset grid\nset palette defined (0 '#f7fbff', 0.5 '#6baed6', 1 '#08306b')\n"
          "set xrange [-0.5:{}]\nset yrange [-0.5:{}]\nset xlabel 'subaperture x'\nset ylabel 'subaperture y'\n"
          "set cblabel {}\nset title {}\nplot $m using 1:2:3 with image pixels notitle\n",
          run.n_subap_x - 0.5, run.n_subap_y - 0.5, gp_text(truth ? "rms error (px)" : "temporal noise (px)"),
          gp_text(run.candidates[c].label));
      const std::string name = fmt::format("map_{}", r);
      if (auto e = draw(name, body); !e.empty()) return e;
      plots.push_back({name, fmt::format("{} over the pupil: {}", truth ? "Error" : "Noise", run.candidates[c].label),
                       fmt::format("Per subaperture: {} ({}); blank where never valid. Input: {}",
                                   truth ? "rms error of both axes against the truth" : "temporal standard deviation of the slopes",
                                   p.label, input_line)});
    }
  }

  // The page.
  std::ostringstream h;
  h << "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<title>slopecast eval report</title>\n"
       "<style>\nbody{font-family:sans-serif;margin:2em;max-width:70em;color:#222}\n"
       "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;padding:.25em .6em;text-align:right}\n"
       "th{background:#eef3f8}td.l,th.l{text-align:left}\n.partial{background:#fde2e2;padding:.6em;border:1px solid #d1495b}\n"
       "figure{margin:1.5em 0}figcaption{font-size:90%;color:#555;max-width:60em}\ncode{font-size:90%}\n"
       ".wide{overflow-x:auto}\nimg{max-width:100%;height:auto}\n</style>\n"
       "</head>\n<body>\n";
  h << "<h1>slopecast eval report</h1>\n";
  if (run.partial)
    h << "<p class=\"partial\" id=\"partial\">Partial report: " << html_escape(run.partial_note) << "</p>\n";
  h << "<p>Started " << html_escape(run.started_utc) << ". Command: <code>" << html_escape(run.command) << "</code></p>\n";
  h << "<h2>Ranking</h2>\n<p>By <b>" << html_escape(run.rank_by) << "</b>"
    << (run.points.size() > 1 ? (geometric(run.rank_by) ? " (geometric mean over the points)" : " (mean over the points)") : "")
    << ".</p>\n";
  h << "<table id=\"ranking\">\n<tr><th>#</th><th class=\"l\">candidate</th><th>" << html_escape(run.rank_by) << "</th></tr>\n";
  for (std::size_t r = 0; r < order.size(); ++r)
    h << "<tr><td>" << r + 1 << "</td><td class=\"l\">" << html_escape(run.candidates[order[r]].label) << "</td><td>"
      << shown(figure[order[r]]) << "</td></tr>\n";
  h << "</table>\n";
  for (std::size_t pi = 0; pi < run.points.size(); ++pi) {
    const auto& p = run.points[pi];
    h << "<h2>" << html_escape(p.label) << "</h2>\n";
    if (std::isfinite(p.cog_theory_px))
      h << "<p>Theory at this point: CoG " << shown(p.cog_theory_px) << " px rms per axis (Rousset 1999, pixel term "
        << "included); Cramér–Rao bound " << shown(p.cramer_rao_px) << " px (Winick 1986).</p>\n";
    h << "<div class=\"wide\"><table class=\"results\" data-point=\"" << html_escape(p.label)
      << "\">\n<tr><th class=\"l\">candidate</th>";
    for (const auto& [name, v] : figures(eval::Summary{})) h << "<th>" << name << "</th>";
    h << "</tr>\n";
    for (std::size_t r = 0; r < order.size(); ++r) {
      const std::size_t c = order[r];
      if (c >= p.results.size()) continue;
      h << "<tr><td class=\"l\">" << html_escape(run.candidates[c].label) << "</td>";
      for (const auto& [name, v] : figures(p.results[c])) h << "<td>" << shown(v) << "</td>";
      h << "</tr>\n";
    }
    h << "</table></div>\n";
    // Why subapertures were not valid: each reason's share of all
    // subaperture-frames (one subaperture may carry several).
    std::vector<std::uint32_t> bits;
    for (const auto& f : client::kFlagLetters)
      for (const auto& r : p.results)
        if (r.invalid_reasons.count(f.bit)) {
          bits.push_back(f.bit);
          break;
        }
    if (!bits.empty()) {
      h << "<p>Why subapertures were flagged (% of all subaperture-frames):</p>\n<div class=\"wide\"><table "
           "class=\"reasons\">\n<tr><th class=\"l\">candidate</th>";
      for (auto bit : bits)
        for (const auto& f : client::kFlagLetters)
          if (f.bit == bit) h << "<th>" << html_escape(f.meaning) << "</th>";
      h << "</tr>\n";
      const double all = static_cast<double>(run.n_subap_x) * run.n_subap_y;
      for (std::size_t r = 0; r < order.size(); ++r) {
        const std::size_t c = order[r];
        if (c >= p.results.size()) continue;
        const auto& res = p.results[c];
        h << "<tr><td class=\"l\">" << html_escape(run.candidates[c].label) << "</td>";
        for (auto bit : bits) {
          const auto it = res.invalid_reasons.find(bit);
          const double n = it == res.invalid_reasons.end() ? 0.0 : static_cast<double>(it->second);
          h << "<td>" << (res.frames ? percent(n / (all * static_cast<double>(res.frames))) : std::string("–")) << "</td>";
        }
        h << "</tr>\n";
      }
      h << "</table></div>\n";
    }
  }
  h << "<h2>Plots</h2>\n";
  for (const auto& pl : plots) {
    std::ifstream svg(plot_dir / (pl.name + ".svg"), std::ios::binary);
    std::stringstream bytes;
    bytes << svg.rdbuf();
    h << "<figure id=\"" << pl.name << "\"><h3>" << html_escape(pl.title) << "</h3>\n<img alt=\"" << html_escape(pl.title)
      << "\" src=\"data:image/svg+xml;base64," << base64(bytes.str()) << "\">\n<figcaption>" << html_escape(pl.caption)
      << "</figcaption></figure>\n";
  }
  h << "<h2>Candidates</h2>\n<table>\n<tr><th class=\"l\">label</th><th class=\"l\">options</th><th class=\"l\">in full</th></tr>\n";
  for (const auto& c : run.candidates)
    h << "<tr><td class=\"l\">" << html_escape(c.label) << "</td><td class=\"l\">" << html_escape(options_text(c))
      << "</td><td class=\"l\">" << html_escape(core::describe(c.settings)) << "</td></tr>\n";
  h << "</table>\n<h2>Inputs</h2>\n<table>\n<tr><th class=\"l\">input</th><th class=\"l\">SHA-256</th></tr>\n";
  for (const auto& [name, hash] : run.inputs)
    h << "<tr><td class=\"l\">" << html_escape(name) << "</td><td class=\"l\"><code>" << hash << "</code></td></tr>\n";
  h << "</table>\n<h2>Settings</h2>\n";
  for (const auto& [group, kv] : run.settings) {
    h << "<h3>" << html_escape(group) << "</h3>\n<table>\n";
    for (const auto& [k, v] : kv) h << "<tr><td class=\"l\">" << html_escape(k) << "</td><td class=\"l\">" << html_escape(v) << "</td></tr>\n";
    h << "</table>\n";
  }
  if (!run.notes.empty()) {
    h << "<h2>Notes</h2>\n<ul>\n";
    for (const auto& n : run.notes) h << "<li>" << html_escape(n) << "</li>\n";
    h << "</ul>\n";
  }
  h << "<p>Written by slopecast eval. Every figure above comes from the daemon's own pipeline code run on these "
       "frames; plots drawn by gnuplot.</p>\n</body>\n</html>\n";
  std::ofstream out(path);
  if (!out) return fmt::format("cannot write '{}'", path.string());
  out << h.str();
  out.close();
  return out ? std::string() : fmt::format("error writing '{}'", path.string());
}

}  // namespace slopecast::cli
