// `slopecast eval`: runs centroider configurations ("candidates") over the
// same frames through the daemon's own pipeline code (daemon/core/pipeline)
// and scores them (client/eval/scorecard.h): against the truth for
// simulated frames (in process, from a recording of the simulator with its
// truth, or a FITS cube with a truth CSV), by temporal noise and agreement
// for plain recordings. Sweeps of photon count and read noise draw the
// classic error-against-signal curves beside the published CoG noise and
// the Cramér–Rao bound. Writes a ranked table, CSV, JSON and an HTML report.
#include <chrono>
#include <cmath>
#include <fstream>
#include <iostream>
#include <map>
#include <sstream>

#include <fmt/format.h>

#include "client/cli/commands.h"
#include "client/cli/eval_plan.h"
#include "client/cli/eval_report.h"
#include "client/cli/frame_source.h"
#include "client/cli/scenario_file.h"
#include "client/eval/candidates.h"
#include "client/eval/scorecard.h"
#include "client/lib/frame_publisher.h"
#include "client/sim/frame_maker.h"
#include "daemon/core/centroid/centroid_noise.h"
#include "daemon/core/frame/frame_check.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/calibration_set.h"
#include "daemon/io/wire_codec.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "eval";
constexpr double kNaN = std::numeric_limits<double>::quiet_NaN();

struct EvalOptions {
  std::string config;
  std::vector<std::string> recordings;
  std::string cube, truth_csv, scenario;
  bool spots = false;
  double response_px = 0;  // > 0: a response sweep over [-R, R]
  // The simulated camera, without --config.
  int subapertures = 16, pitch_px = 15;
  std::string pixel_type = "u16";
  // The simulated light and detector.
  std::uint64_t frames = 200;
  std::uint64_t seed = 1;
  double spot_sigma_px = 0.9;
  std::vector<double> photons{5000};
  std::vector<double> read_noise_e{3};
  double background_e = 0;
  double max_offset_px = 1.0;
  double bias_adu = 100;
  bool noiseless = false;
  // Recorded inputs: which frames.
  std::uint64_t first = 0, count = 0;
  // Candidates.
  std::vector<std::string> candidates;
  std::string plan;
  // Scoring and output.
  eval::ScoringSettings scoring;
  std::string rank_by;
  std::string out_dir;
  bool per_frame = false;
  bool no_html = false;
  double progress_s = 2.0;
  // Whether the sweep options were given (they belong to simulated inputs).
  bool photons_given = false, read_noise_given = false;
};

// One frame to measure and what is known about it.
struct EvalFrame {
  std::string header, pixels;
  std::uint64_t seq = 0;
  bool has_truth = false;
  std::vector<float> dx, dy, lit;
};

class EvalInput {
 public:
  virtual ~EvalInput() = default;
  virtual bool next(EvalFrame& f) = 0;
  virtual std::uint64_t total() const = 0;  // frames expected (0: unknown)
};

// Frames made here by the simulator, with exact truth.
class SimulatedInput : public EvalInput {
 public:
  SimulatedInput(std::unique_ptr<sim::FrameMaker> maker, core::CameraSpec camera, std::uint64_t frames)
      : maker_(std::move(maker)), camera_(camera), frames_(frames) {}
  bool next(EvalFrame& f) override {
    if (k_ >= frames_) return false;
    maker_->make(k_, pixels_, truth_);
    f.header = client::make_frame_header(k_, 0, camera_.width_px, camera_.height_px, io::to_wire(camera_.format))
                   .SerializeAsString();
    f.pixels.assign(reinterpret_cast<const char*>(pixels_.data()), pixels_.size());
    f.seq = k_;
    f.has_truth = true;
    f.dx.assign(truth_.dx_px.begin(), truth_.dx_px.end());
    f.dy.assign(truth_.dy_px.begin(), truth_.dy_px.end());
    f.lit.assign(truth_.illuminated.begin(), truth_.illuminated.end());
    ++k_;
    return true;
  }
  std::uint64_t total() const override { return frames_; }

 private:
  std::unique_ptr<sim::FrameMaker> maker_;
  core::CameraSpec camera_;
  std::uint64_t frames_, k_ = 0;
  std::vector<std::byte> pixels_;
  sim::SubapertureTruth truth_;
};

struct TruthRow {
  std::vector<float> dx, dy, lit;
};

// Recorded frames (a recording series or a cube), with truth by seq when known.
class RecordedInput : public EvalInput {
 public:
  RecordedInput(std::unique_ptr<FrameSource> source, std::map<std::uint64_t, TruthRow> truth, std::uint64_t first,
                std::uint64_t count, std::uint64_t total)
      : source_(std::move(source)), truth_(std::move(truth)), first_(first), count_(count), total_(total) {}
  bool next(EvalFrame& f) override {
    Frame raw;
    for (;;) {
      if (count_ && index_ >= first_ + count_) return false;
      if (!source_->next(raw)) return false;
      if (index_++ >= first_) break;
    }
    f.header = std::move(raw.header);
    f.pixels = std::move(raw.pixels);
    f.seq = raw.seq;
    auto it = truth_.find(raw.seq);
    f.has_truth = it != truth_.end();
    if (f.has_truth) {
      f.dx = it->second.dx;
      f.dy = it->second.dy;
      f.lit = it->second.lit;
    }
    return true;
  }
  std::uint64_t total() const override {
    if (!total_) return count_;
    const std::uint64_t after = total_ > first_ ? total_ - first_ : 0;
    return count_ ? std::min(count_, after) : after;
  }

 private:
  std::unique_ptr<FrameSource> source_;
  std::map<std::uint64_t, TruthRow> truth_;
  std::uint64_t first_, count_, total_;
  std::uint64_t index_ = 0;
};

// frame_seq,subaperture,true_dx_px,true_dy_px[,illuminated]: the truth CSV
// that `slopecast sim --truth-csv` and `slopecast export --truth-csv` write.
std::variant<std::map<std::uint64_t, TruthRow>, std::string> read_truth_csv(const std::string& path, int n_subap) {
  std::ifstream in(path);
  if (!in) return fmt::format("cannot read truth file '{}'", path);
  std::string line;
  if (!std::getline(in, line)) return fmt::format("{}: empty (expected a header line)", path);
  if (!line.empty() && line.back() == '\r') line.pop_back();
  std::vector<std::string> names;
  {
    std::stringstream h(line);
    for (std::string c; std::getline(h, c, ',');) names.push_back(c);
  }
  auto column = [&](std::initializer_list<const char*> choices) -> int {
    for (std::size_t i = 0; i < names.size(); ++i)
      for (const char* c : choices)
        if (names[i] == c) return static_cast<int>(i);
    return -1;
  };
  const int c_frame = column({"frame_seq", "frame"}), c_sub = column({"subaperture"}),
            c_dx = column({"true_dx_px"}), c_dy = column({"true_dy_px"}), c_lit = column({"illuminated"});
  if (c_frame < 0 || c_sub < 0 || c_dx < 0 || c_dy < 0)
    return fmt::format("{}: the header must name frame_seq (or frame), subaperture, true_dx_px and true_dy_px "
                       "(illuminated is optional); got '{}'",
                       path, line);
  std::map<std::uint64_t, TruthRow> out;
  std::uint64_t line_no = 1;
  std::vector<std::string> cells;
  while (std::getline(in, line)) {
    ++line_no;
    if (!line.empty() && line.back() == '\r') line.pop_back();
    if (line.empty()) continue;
    cells.clear();
    std::stringstream row(line);
    for (std::string c; std::getline(row, c, ',');) cells.push_back(c);
    if (cells.size() < names.size())
      return fmt::format("{} line {}: {} values, the header has {}", path, line_no, cells.size(), names.size());
    double v[5] = {0, 0, 0, 0, 1};
    const int cols[5] = {c_frame, c_sub, c_dx, c_dy, c_lit};
    for (int k = 0; k < 5; ++k) {
      if (cols[k] < 0) continue;
      char* end = nullptr;
      const std::string& cell = cells[static_cast<std::size_t>(cols[k])];
      v[k] = std::strtod(cell.c_str(), &end);
      if (cell.empty() || *end != '\0' || !std::isfinite(v[k]))
        return fmt::format("{} line {}: '{}' is not a number", path, line_no, cell);
    }
    if (v[0] < 0 || v[0] != std::floor(v[0]))
      return fmt::format("{} line {}: frame {} is not a whole number >= 0", path, line_no, v[0]);
    if (v[1] < 0 || v[1] >= n_subap || v[1] != std::floor(v[1]))
      return fmt::format("{} line {}: subaperture {} is outside 0..{} (the config's grid)", path, line_no, v[1],
                         n_subap - 1);
    auto& t = out[static_cast<std::uint64_t>(v[0])];
    if (t.dx.empty()) {
      t.dx.assign(n_subap, 0.0f);
      t.dy.assign(n_subap, 0.0f);
      t.lit.assign(n_subap, 0.0f);  // a subaperture the file does not list counts as unlit
    }
    const auto s = static_cast<std::size_t>(v[1]);
    t.dx[s] = static_cast<float>(v[2]);
    t.dy[s] = static_cast<float>(v[3]);
    t.lit[s] = static_cast<float>(v[4]);
  }
  if (out.empty()) return fmt::format("{}: no truth rows", path);
  return out;
}

std::string join_values(const std::vector<double>& v) {
  std::string s;
  for (double x : v) s += fmt::format("{}{}", s.empty() ? "" : ",", x);
  return s;
}

void run_eval(EvalOptions o) {
  const int sources = (o.recordings.empty() ? 0 : 1) + (o.cube.empty() ? 0 : 1) + (o.scenario.empty() ? 0 : 1) +
                      (o.spots ? 1 : 0) + (o.response_px > 0 ? 1 : 0);
  if (sources != 1)
    return fail(kCmd, "give one input: --recording FILE..., --cube FILE (with --truth), --scenario FILE, --spots or "
                      "--response-px R");
  const bool simulated = o.spots || o.response_px > 0 || !o.scenario.empty();
  if (!simulated && (o.photons_given || o.read_noise_given))
    return fail(kCmd, "--photons and --read-noise-e sweep the simulator: they go with --spots, --response-px or --scenario");
  if (simulated && (o.first || o.count))
    return fail(kCmd, "--first and --count pick recorded frames; a simulation makes --frames frames per point");
  if (!o.truth_csv.empty() && o.cube.empty()) return fail(kCmd, "--truth goes with --cube (a recording carries its own truth)");
  if (!simulated && o.config.empty())
    return fail(kCmd, "a recording or a cube is measured with a slopecastd config's geometry and calibration: give --config");
  if (!o.rank_by.empty() && !known_figure(o.rank_by))
    return fail(kCmd, fmt::format("--rank-by '{}': one of rms, bias, noise, valid, time, agreement", o.rank_by));
  if (!o.no_html && !o.out_dir.empty() && !gnuplot_available())
    return fail(kCmd, "the HTML report's plots are drawn by gnuplot, which is not on PATH (Debian package "
                      "gnuplot-nox); install it or pass --no-html");
  if (o.out_dir.empty() && o.per_frame) return fail(kCmd, "--per-frame writes into --out DIR: give --out");

  EvalRun run;
  run.command = invocation();
  run.started_utc = io::utc_now_iso();

  // The pipeline every candidate shares: the daemon's, from its config.
  core::PipelineSettings base;
  std::filesystem::path base_dir = ".";
  std::optional<io::DaemonConfig> config;
  if (!o.config.empty()) {
    // Everything the daemon loads (dark, sky, flat, calibration set,
    // reference image): the pipeline must be the daemon's.
    config = read_daemon_config(kCmd, o.config, io::ConfigLoad{.load_images = true});
    if (!config) return;
    base = config->pipeline;
    base_dir = config->base_dir;
    run.inputs.emplace_back("config " + o.config, sha256_of_file(o.config));
  } else {
    const auto format = core::parse_pixel_format(o.pixel_type);
    if (!format) return fail(kCmd, fmt::format("--pixel-type '{}' is not one of u8, u16, u32, f32", o.pixel_type));
    base.camera = core::CameraSpec{o.subapertures * o.pitch_px, o.subapertures * o.pitch_px, *format};
    base.grid = core::LensletGrid{o.subapertures, o.subapertures, o.pitch_px, 0, 0};
  }
  const core::CameraSpec camera = base.camera;
  const core::LensletGrid grid = base.grid;
  const int n_subap = grid.n_subap_x * grid.n_subap_y;
  run.n_subap_x = grid.n_subap_x;
  run.n_subap_y = grid.n_subap_y;

  // Candidates.
  std::vector<eval::Candidate> candidates;
  for (const auto& text : o.candidates) {
    auto made = eval::parse_candidate_text(text, base.centroider);
    if (auto* e = std::get_if<std::string>(&made)) return fail(kCmd, *e);
    for (auto& c : std::get<std::vector<eval::Candidate>>(made)) candidates.push_back(std::move(c));
  }
  if (!o.plan.empty()) {
    auto made = read_eval_plan(o.plan, base.centroider);
    if (auto* e = std::get_if<std::string>(&made)) return fail(kCmd, *e);
    for (auto& c : std::get<std::vector<eval::Candidate>>(made)) candidates.push_back(std::move(c));
    run.inputs.emplace_back("plan " + o.plan, sha256_of_file(o.plan));
  }
  if (candidates.empty()) {
    eval::Candidate c;
    c.settings = base.centroider;
    c.label = std::string(core::centroider_name(c.settings.kind)) + (config ? " (as configured)" : "");
    candidates.push_back(std::move(c));
  }
  if (auto e = eval::check_labels(candidates); !e.empty()) return fail(kCmd, e);
  for (auto& c : candidates) {
    if (c.settings.reference == core::ReferenceSource::kCaptured)
      return fail(kCmd, fmt::format("candidate \"{}\": reference = captured is taken live from the daemon; for eval "
                                    "save it to a FITS file and use reference = file",
                                    c.label));
    if (auto e = io::load_reference_image(c.settings, base_dir); !e.empty())
      return fail(kCmd, fmt::format("candidate \"{}\": {}", c.label, e));
  }
  run.candidates = candidates;

  // Simulated inputs: the scene, and the dark the pipeline needs for it.
  std::optional<ScenarioFile> scenario;
  if (!o.scenario.empty()) {
    auto read = read_scenario(o.scenario);
    if (auto* e = std::get_if<std::string>(&read)) return fail(kCmd, *e);
    scenario = std::get<ScenarioFile>(std::move(read));
    scenario->scene.path_s = static_cast<double>(o.frames) / scenario->scene.rate_hz;
    if (auto e = sim::validate(scenario->scene, grid); !e.empty()) return fail(kCmd, o.scenario + ": " + e);
    run.inputs.emplace_back("scenario " + o.scenario, sha256_of_file(o.scenario));
    if (!o.read_noise_given) o.read_noise_e = {scenario->detector.read_noise_e};
    if (!o.photons_given) o.photons = {scenario->scene.photons_per_subaperture};
    o.bias_adu = scenario->detector.bias_adu;
  }
  if (o.noiseless) o.read_noise_e = {0.0};
  if (simulated && (!base.layout.empty() || !base.reference_slope_x_px.empty()))
    run.notes.push_back("the simulator draws spots on the config's regular grid, but this config's pipeline places "
                        "zero points from a layout or subtracts reference slopes: the errors include that difference");
  if (simulated && base.dark_adu.empty() && o.bias_adu > 0) {
    base.dark_adu.assign(static_cast<std::size_t>(camera.width_px) * camera.height_px, static_cast<float>(o.bias_adu));
    run.notes.push_back(fmt::format("dark: the simulator's bias, {} ADU on every pixel, known exactly", o.bias_adu));
  }
  for (const auto& c : candidates) {
    core::PipelineSettings ps = base;
    ps.centroider = c.settings;
    if (auto e = core::validate(ps); !e.empty()) return fail(kCmd, fmt::format("candidate \"{}\": {}", c.label, e));
  }

  // Sweep points: photons x read noise for the simulator, one point for recorded frames.
  struct PointSpec {
    double photons = kNaN, read_noise = kNaN;
  };
  std::vector<PointSpec> specs;
  if (simulated)
    for (double r : o.read_noise_e)
      for (double p : o.photons) specs.push_back({p, r});
  else
    specs.push_back({});
  for (const auto& s : specs)
    if (simulated && (!(s.photons > 0) || !(s.read_noise >= 0)))
      return fail(kCmd, fmt::format("photons must be > 0 and read noise >= 0, got {} and {}", s.photons, s.read_noise));

  // Recorded truth.
  std::map<std::uint64_t, TruthRow> truth_rows;
  if (!o.truth_csv.empty()) {
    auto read = read_truth_csv(o.truth_csv, n_subap);
    if (auto* e = std::get_if<std::string>(&read)) return fail(kCmd, *e);
    truth_rows = std::get<std::map<std::uint64_t, TruthRow>>(std::move(read));
    run.inputs.emplace_back("truth " + o.truth_csv, sha256_of_file(o.truth_csv));
  }
  if (!o.recordings.empty()) {
    for (const auto& in : o.recordings) {
      auto opened = io::RecordingReader::open(in);
      if (auto* e = std::get_if<std::string>(&opened)) return fail(kCmd, *e);
      run.inputs.emplace_back("recording " + in, sha256_of_file(in));
    }
    std::uint64_t problems = 0;
    for (auto& [seq, t] : read_recorded_truth(o.recordings, problems)) {
      if (static_cast<int>(t.true_dx_px_size()) != n_subap || static_cast<int>(t.true_dy_px_size()) != n_subap)
        return fail(kCmd, fmt::format("the recording's truth for frame {} has {} subapertures, the config's grid {}",
                                      seq, t.true_dx_px_size(), n_subap));
      TruthRow row{{t.true_dx_px().begin(), t.true_dx_px().end()}, {t.true_dy_px().begin(), t.true_dy_px().end()},
                   {t.illuminated().begin(), t.illuminated().end()}};
      truth_rows.emplace(seq, std::move(row));
    }
  }
  if (!o.cube.empty()) run.inputs.emplace_back("cube " + o.cube, sha256_of_file(o.cube));
  // Truth from the simulator, a truth file, or the recording's own truth records.
  const bool truth_expected = simulated || !truth_rows.empty();
  run.rank_by = o.rank_by.empty() ? (truth_expected ? "rms" : "noise") : o.rank_by;

  // The settings behind every figure.
  {
    std::vector<std::pair<std::string, std::string>> p{
        {"camera", fmt::format("{} x {} {}", camera.width_px, camera.height_px, core::pixel_format_name(camera.format))},
        {"grid", fmt::format("{} x {} of {} px from ({}, {})", grid.n_subap_x, grid.n_subap_y, grid.pitch_px,
                             grid.origin_x_px, grid.origin_y_px)},
        {"layout", base.layout.empty() ? "regular" : fmt::format("{} boxes from a layout", base.layout.size())},
        {"dark", base.dark_adu.empty() ? "none" : "yes"},
        {"sky", base.sky_adu.empty() ? "none" : "yes"},
        {"flat", base.flat.empty() ? "none" : "yes"},
        {"bad pixels", base.bad_pixels.empty() ? "none" : "map"},
        {"valid map", base.valid_map.empty() ? "all in" : "yes"},
        {"reference slopes", base.reference_slope_x_px.empty() ? "none" : "yes"},
        {"background", std::string(core::background_mode_name(base.background))},
        {"min_flux_adu", fmt::format("{}", base.min_flux_adu)},
        {"min_snr", fmt::format("{}", base.min_snr)},
        {"edge_margin_px", fmt::format("{}", base.edge_margin_px)},
        {"slopes", "px, before any unit conversion (truth is in px)"}};
    run.settings.emplace_back("pipeline", std::move(p));
    run.settings.emplace_back(
        "scoring", std::vector<std::pair<std::string, std::string>>{
                       {"usable_fraction", fmt::format("{}", o.scoring.usable_fraction)},
                       {"bin_px", fmt::format("{}", o.scoring.bin_px)},
                       {"gain_within_px", fmt::format("{}", o.scoring.gain_within_px)},
                       {"linear_tolerance_px", fmt::format("{}", o.scoring.linear_tolerance_px)},
                       {"rank_by", run.rank_by}});
    if (simulated) {
      std::vector<std::pair<std::string, std::string>> s{
          {"scene", o.spots ? "spots at random offsets" : o.response_px > 0 ? "response sweep" : "turbulence scenario"},
          {"frames per point", fmt::format("{}", o.frames)},
          {"seed", fmt::format("{}", o.seed)},
          {"photons per subaperture", join_values(o.photons)},
          {"read noise e-", join_values(o.read_noise_e)},
          {"photon noise", o.noiseless ? "off" : "on"},
          {"bias ADU", fmt::format("{}", o.bias_adu)},
          {"gain e-/ADU", "1"}};
      if (scenario.has_value()) {
        s.emplace_back("scenario", o.scenario);
      } else {
        s.emplace_back("spot sigma px", fmt::format("{}", o.spot_sigma_px));
        s.emplace_back("background e-/px", fmt::format("{}", o.background_e));
        if (o.spots) s.emplace_back("max offset px", fmt::format("{}", o.max_offset_px));
        if (o.response_px > 0) s.emplace_back("response range px", fmt::format("±{}", o.response_px));
      }
      std::string text;
      for (const auto& [k, v] : s) text += k + "=" + v + "\n";
      text += fmt::format("camera={}x{} {}\ngrid={}x{}x{}\n", camera.width_px, camera.height_px,
                          core::pixel_format_name(camera.format), grid.n_subap_x, grid.n_subap_y, grid.pitch_px);
      run.inputs.emplace_back(fmt::format("simulated frames (seed {})", o.seed), sha256_of_text(text));
      run.settings.emplace_back("simulation", std::move(s));
    }
    run.input_kind = o.spots ? "spots" : o.response_px > 0 ? "response" : scenario ? "scenario"
                     : !o.recordings.empty() ? "recording" : "cube";
  }

  // Output files, refused before any work if they would replace a report.
  std::filesystem::path out_dir = o.out_dir;
  std::ofstream per_frame;
  if (!o.out_dir.empty()) {
    std::error_code ec;
    std::filesystem::create_directories(out_dir, ec);
    if (ec) return fail(kCmd, fmt::format("cannot make '{}': {}", o.out_dir, ec.message()));
    for (const char* f : {"summary.csv", "report.json", "report.html", "measurements.csv"})
      if (std::filesystem::exists(out_dir / f))
        return fail(kCmd, fmt::format("'{}' already holds an eval report ({}): choose another --out", o.out_dir, f));
    if (o.per_frame) {
      per_frame.open(out_dir / "measurements.csv");
      if (!per_frame) return fail(kCmd, fmt::format("cannot write '{}'", (out_dir / "measurements.csv").string()));
      per_frame << "point,candidate,frame_seq,subaperture,slope_x_px,slope_y_px,flux_adu,peak_adu,valid,flags,"
                   "true_dx_px,true_dy_px,illuminated\n";
    }
  }

  using clock = std::chrono::steady_clock;
  auto last_progress = clock::now();
  std::uint64_t refused = 0, without_truth = 0;
  std::string last_refusal;
  v1::FrameHeader header_scratch;
  for (std::size_t pi = 0; pi < specs.size() && !run.partial; ++pi) {
    const PointSpec& spec = specs[pi];
    EvalPoint point;
    point.cog_theory_px = point.cramer_rao_px = kNaN;
    if (simulated) {
      point.knobs = {{"photons", spec.photons}, {"read_noise_e", spec.read_noise}};
      point.label = fmt::format("photons={} read_noise_e={}", spec.photons, spec.read_noise);
    } else {
      point.label = "all frames";
    }
    // The input for this point.
    std::unique_ptr<EvalInput> input;
    sim::DetectorModel detector;
    detector.read_noise_e = spec.read_noise;
    detector.bias_adu = o.bias_adu;
    detector.gain_e_per_adu = 1.0;
    detector.full_scale_adu = std::min(core::full_scale_adu(camera.format), 4294967295.0);
    detector.photon_noise = !o.noiseless;
    std::unique_ptr<sim::TurbulenceSim> turbulence;
    if (scenario) {
      detector = scenario->detector;
      detector.read_noise_e = spec.read_noise;
      detector.photon_noise = detector.photon_noise && !o.noiseless;
      const double bits_full = scenario->bit_depth ? std::ldexp(1.0, scenario->bit_depth) - 1 : detector.full_scale_adu;
      detector.full_scale_adu = std::min(bits_full, std::min(core::full_scale_adu(camera.format), 4294967295.0));
      sim::TurbulenceScene scene = scenario->scene;
      scene.photons_per_subaperture = spec.photons;
      turbulence = std::make_unique<sim::TurbulenceSim>(scene, grid, o.seed);
      input = std::make_unique<SimulatedInput>(
          std::make_unique<sim::TurbulenceFrameMaker>(*turbulence, detector, camera, o.seed + 1), camera, o.frames);
    } else if (simulated) {
      sim::SpotFieldSettings field;
      field.grid = grid;
      field.spot_sigma_px = o.spot_sigma_px;
      field.photons_per_spot = spec.photons;
      field.max_offset_px = o.spots ? o.max_offset_px : o.response_px;
      if (auto e = sim::validate(field); !e.empty()) return fail(kCmd, e);
      if (auto e = sim::validate(detector); !e.empty()) return fail(kCmd, e);
      sim::SpotFrameMaker::OffsetRule rule;
      if (o.response_px > 0) {
        const double r = o.response_px;
        const std::uint64_t n = o.frames;
        rule = [r, n, n_subap](std::uint64_t k) {
          const double s = n > 1 ? -r + 2 * r * static_cast<double>(k) / static_cast<double>(n - 1) : 0.0;
          return sim::SpotOffsets{std::vector<double>(n_subap, s), std::vector<double>(n_subap, s)};
        };
      }
      input = std::make_unique<SimulatedInput>(
          std::make_unique<sim::SpotFrameMaker>(field, detector, camera, o.background_e, o.seed + pi, rule), camera,
          o.frames);
      if (o.spots && !o.noiseless) {
        // Theory for this light. Integer pixels add 1/12 ADU^2 of
        // quantisation noise to each pixel's read noise when there is read
        // noise to round; without it, at 1 e-/ADU, the photo-electron counts
        // are whole ADU already and rounding adds nothing (derived).
        core::SpotNoiseInputs in;
        in.photons_e = spec.photons;
        in.background_e_per_px = o.background_e;
        const double q = camera.format == core::PixelFormat::kF32 || spec.read_noise == 0 ? 0.0 : 1.0 / 12.0;
        in.read_noise_e = std::sqrt(spec.read_noise * spec.read_noise + q);
        in.spot_sigma_px = o.spot_sigma_px;
        in.box_px = grid.pitch_px;
        core::CentroiderSettings cog;
        cog.kind = core::CentroiderKind::kCog;
        point.cog_theory_px = std::sqrt(core::centroid_noise_variance(cog, in));
        point.cramer_rao_px = std::sqrt(core::cramer_rao_variance(in));
      }
    } else if (!o.cube.empty()) {
      auto opened = io::FitsFrameReader::open(o.cube);
      if (auto* e = std::get_if<io::FitsError>(&opened)) return fail(kCmd, e->message);
      auto cube = std::make_unique<CubeSource>(kCmd, std::move(std::get<std::unique_ptr<io::FitsFrameReader>>(opened)),
                                               "slopecast-eval", o.cube);
      if (cube->use_frame_table()) run.notes.push_back("frame seqs from the cube's FRAMES table (FRAME_SEQ)");
      else run.notes.push_back("frame seqs are the cube's plane numbers from 0");
      const auto planes = static_cast<std::uint64_t>(cube->planes());
      input = std::make_unique<RecordedInput>(std::move(cube), truth_rows, o.first, o.count, planes);
    } else {
      input = std::make_unique<RecordedInput>(std::make_unique<RecordingSource>(kCmd, o.recordings), truth_rows,
                                              o.first, o.count, 0);
    }

    std::vector<core::Pipeline> pipelines;
    std::vector<core::FrameMeasurement> measured;
    std::vector<eval::Scorecard> cards;
    for (const auto& c : candidates) {
      core::PipelineSettings ps = base;
      ps.centroider = c.settings;
      pipelines.emplace_back(std::move(ps));
      measured.push_back(pipelines.back().make_measurement());
      cards.emplace_back(n_subap, o.scoring);
    }
    EvalFrame f;
    std::uint64_t done = 0;
    const std::uint64_t total = input->total();
    while (input->next(f)) {
      if (stop_requested()) {
        run.partial = true;
        run.partial_note = fmt::format("interrupted at point {} of {} ({}), after {} frames of it", pi + 1, specs.size(),
                                       point.label, done);
        break;
      }
      const auto facts = io::decode_frame_header(std::as_bytes(std::span(f.header)), header_scratch);
      const auto payload = std::as_bytes(std::span(f.pixels));
      core::FrameCheckResult checked;
      if (facts) checked = core::check_frame(*facts, payload, camera);
      if (!facts || !checked.image) {
        std::string why = "its header does not parse";
        if (facts) {
          core::RejectedFrame seen;
          seen.facts = *facts;
          seen.parts = 2;
          seen.header_bytes = f.header.size();
          seen.payload_bytes = f.pixels.size();
          why = fmt::format("{} ({})", core::frame_reject_name(checked.reject),
                            core::describe_reject(checked.reject, seen, camera));
        }
        if (++refused <= 3) std::cerr << fmt::format("slopecast eval: frame seq {} refused: {}\n", f.seq, why);
        last_refusal = why;
        continue;
      }
      eval::TruthView truth;
      if (f.has_truth) {
        if (f.dx.size() != static_cast<std::size_t>(n_subap))
          return fail(kCmd, fmt::format("frame seq {}: truth for {} subapertures, the grid has {}", f.seq, f.dx.size(), n_subap));
        truth = {f.dx, f.dy, f.lit};
      } else if (truth_expected) {
        ++without_truth;
      }
      for (std::size_t c = 0; c < pipelines.size(); ++c) {
        const auto t0 = clock::now();
        pipelines[c].measure(*checked.image, measured[c]);
        const double dt = std::chrono::duration<double>(clock::now() - t0).count();
        cards[c].add(measured[c], f.has_truth ? &truth : nullptr, c > 0 ? &measured[0] : nullptr, dt);
        if (per_frame.is_open()) {
          const auto& m = measured[c];
          for (int i = 0; i < n_subap; ++i) {
            per_frame << fmt::format("{},{},{},{},{},{},{},{},{},{}", csv_field(point.label), csv_field(candidates[c].label),
                                     f.seq, i, m.slope_x_px[i], m.slope_y_px[i], m.flux_adu[i], m.peak_adu[i],
                                     m.flags[i] == core::kFlagNone ? 1 : 0, m.flags[i]);
            if (f.has_truth)
              per_frame << fmt::format(",{},{},{}\n", f.dx[i], f.dy[i], f.lit.empty() ? 1.0f : f.lit[i]);
            else
              per_frame << ",,,\n";
          }
        }
      }
      ++done;
      if (o.progress_s > 0 && clock::now() - last_progress > std::chrono::duration<double>(o.progress_s)) {
        last_progress = clock::now();
        std::cerr << fmt::format("slopecast eval: point {}/{} ({}): frame {}{}, {} candidate(s)\n", pi + 1, specs.size(),
                                 point.label, done, total ? fmt::format("/{}", total) : "", candidates.size());
      }
    }
    for (auto& card : cards) point.results.push_back(card.summary());
    if (done > 0 || !run.partial) run.points.push_back(std::move(point));
  }
  if (refused) run.notes.push_back(fmt::format("{} frame(s) refused by the frame check (wrong size or type)", refused));
  if (without_truth)
    run.notes.push_back(fmt::format("{} frame(s) had no truth and were scored for noise only", without_truth));
  if (run.points.empty() || run.points[0].results.empty() || run.points[0].results[0].frames == 0) {
    if (run.partial) return void(exit_code() = stopped_exit_code());
    return fail(kCmd, refused ? fmt::format("every frame was refused ({} of them), the last: {}; is --config this "
                                            "camera's config?",
                                            refused, last_refusal)
                              : std::string("no frame was measured: the input holds no frames"));
  }

  print_table(std::cout, run);
  for (const auto& n : run.notes) std::cout << "note: " << n << "\n";
  if (!o.out_dir.empty()) {
    per_frame.close();
    if (auto e = write_summary_csv(out_dir / "summary.csv", run); !e.empty()) return fail(kCmd, e);
    if (auto e = write_json(out_dir / "report.json", run); !e.empty()) return fail(kCmd, e);
    if (!o.no_html)
      if (auto e = write_html(out_dir / "report.html", out_dir / "plots", run); !e.empty()) return fail(kCmd, e);
    std::cout << fmt::format("wrote {}: summary.csv, report.json{}{}\n", o.out_dir, o.no_html ? "" : ", report.html (plots/)",
                             o.per_frame ? ", measurements.csv" : "");
  }
  if (run.partial) {
    std::cout << "PARTIAL: " << run.partial_note << "\n";
    exit_code() = stopped_exit_code();
  }
}

}  // namespace

void add_eval_command(CLI::App& app) {
  auto o = std::make_shared<EvalOptions>();
  auto* cmd = app.add_subcommand(
      "eval", "Score centroider configurations on the same frames through the daemon's own pipeline: against the "
              "truth (simulated frames, a recording of the simulator, or a cube with a truth CSV) or by noise and "
              "agreement (plain recordings); ranked table, CSV, JSON and an HTML report with plots");
  cmd->add_option("--config", o->config,
                  "slopecastd config: the camera, grid, calibration and pipeline settings every candidate runs "
                  "with (needed for recordings and cubes; for simulated inputs it sets the simulated camera too)")
      ->check(CLI::ExistingFile);
  auto* recording = cmd->add_option("--recording", o->recordings,
                                    "Recording file(s) in order (`slopecast record`); truth records, when the "
                                    "recording has them, are the truth")
                        ->check(CLI::ExistingFile);
  auto* cube = cmd->add_option("--cube", o->cube, "FITS cube of frames (BITPIX 8, 16, 32, -32, -64)")
                   ->check(CLI::ExistingFile);
  cmd->add_option("--truth", o->truth_csv,
                  "Truth CSV for --cube: header frame_seq,subaperture,true_dx_px,true_dy_px[,illuminated]; frame_seq "
                  "is the cube's FRAMES table seq when it has one, else the plane number from 0")
      ->check(CLI::ExistingFile);
  auto* scenario = cmd->add_option("--scenario", o->scenario, "Simulate a turbulence scenario (TOML, as for `slopecast sim`)")
                       ->check(CLI::ExistingFile);
  auto* spots = cmd->add_flag("--spots", o->spots, "Simulate Gaussian spots at random offsets");
  auto* response = cmd->add_option("--response-px", o->response_px,
                                   "Simulate a response sweep: every spot steps through the same shift from -R to "
                                   "+R px in x and y over the frames")
                       ->check(CLI::Range(0.0, 1000.0));
  recording->excludes(cube)->excludes(scenario)->excludes(spots)->excludes(response);
  cube->excludes(scenario)->excludes(spots)->excludes(response);
  scenario->excludes(spots)->excludes(response);
  spots->excludes(response);
  cmd->add_option("--subapertures", o->subapertures, "Simulated grid without --config: subapertures across and down")
      ->check(CLI::Range(1, 1024))->capture_default_str();
  cmd->add_option("--pitch-px", o->pitch_px, "Simulated grid without --config: box side, px")
      ->check(CLI::Range(2, 1024))->capture_default_str();
  cmd->add_option("--pixel-type", o->pixel_type, "Simulated camera without --config: u8, u16, u32 or f32")
      ->capture_default_str();
  cmd->add_option("--frames", o->frames, "Simulated frames per point")->check(CLI::Range(1, 100000000))->capture_default_str();
  cmd->add_option("--seed", o->seed, "Simulator seed")->capture_default_str();
  cmd->add_option("--spot-sigma-px", o->spot_sigma_px, "Simulated spot rms width, px")
      ->check(CLI::Range(0.05, 100.0))->capture_default_str();
  auto* photons = cmd->add_option("--photons", o->photons,
                                  "Photo-electrons per spot; several (comma-separated) sweep the signal")
                      ->delimiter(',')->capture_default_str();
  auto* read_noise = cmd->add_option("--read-noise-e", o->read_noise_e,
                                     "Read noise, e- rms per pixel; several sweep it")
                         ->delimiter(',')->capture_default_str();
  cmd->add_option("--background-e-per-px", o->background_e, "Diffuse light on every pixel, e- per frame")
      ->check(CLI::Range(0.0, 1e9))->capture_default_str();
  cmd->add_option("--max-offset-px", o->max_offset_px, "--spots: offsets drawn from [-max, max] px")
      ->check(CLI::Range(0.0, 1000.0))->capture_default_str();
  cmd->add_option("--bias-adu", o->bias_adu, "Simulated detector bias, ADU (the pipeline's dark unless the config has one)")
      ->check(CLI::Range(0.0, 1e9))->capture_default_str();
  cmd->add_flag("--noiseless", o->noiseless, "No photon or read noise: the method's own error alone");
  cmd->add_option("--first", o->first, "Recorded inputs: skip this many frames")->capture_default_str();
  cmd->add_option("--count", o->count, "Recorded inputs: measure at most this many frames (0: all)")->capture_default_str();
  cmd->add_option("--candidate", o->candidates,
                  "A centroider configuration: method then key=value, a comma list sweeps "
                  "(\"tcog threshold=0.1,0.2,0.3\"); repeat for more. None: the config's centroider")
      ->take_all()->allow_extra_args(false);
  cmd->add_option("--plan", o->plan, "TOML file of [[candidate]] tables (lists sweep)")->check(CLI::ExistingFile);
  cmd->add_option("--usable-fraction", o->scoring.usable_fraction,
                  "Truth: a subaperture at least this much lit should be valid (fewer: it should not)")
      ->check(CLI::Range(0.0, 1.0))->capture_default_str();
  cmd->add_option("--bin-px", o->scoring.bin_px, "Width of the true-shift bins (response curve, linear range), px")
      ->check(CLI::Range(1e-4, 100.0))->capture_default_str();
  cmd->add_option("--gain-within-px", o->scoring.gain_within_px, "The response gain is fitted over |true| up to this, px")
      ->check(CLI::Range(1e-3, 1000.0))->capture_default_str();
  cmd->add_option("--linear-tolerance-px", o->scoring.linear_tolerance_px,
                  "The linear range ends at the first bin (from 0 outward) whose mean departs from the fitted line by more, px")
      ->check(CLI::Range(1e-6, 100.0))->capture_default_str();
  cmd->add_option("--rank-by", o->rank_by,
                  "Figure of merit: rms, bias, noise, valid, time, agreement (default: rms with truth, noise without)");
  cmd->add_option("--out", o->out_dir, "Write summary.csv, report.json and report.html (plots/ beside it) into this folder");
  cmd->add_flag("--per-frame", o->per_frame, "Also write every measured slope to measurements.csv in --out");
  cmd->add_flag("--no-html", o->no_html, "Skip the HTML report (no gnuplot needed)");
  cmd->add_option("--progress-s", o->progress_s, "Seconds between progress lines on stderr (0: none)")
      ->check(CLI::Range(0.0, 3600.0))->capture_default_str();
  cmd->callback([o, photons, read_noise] {
    o->photons_given = photons->count() > 0;
    o->read_noise_given = read_noise->count() > 0;
    run_eval(*o);
  });
}

}  // namespace slopecast::cli
