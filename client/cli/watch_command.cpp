// `slopecast watch`: subscribe to measurements and print a compact live view,
// one line per interval, and a closing summary.
#include <cmath>
#include <iostream>
#include <memory>
#include <thread>

#include <fmt/format.h>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/flag_letters.h"
#include "client/lib/insight_subscriber.h"
#include "client/lib/measurement_subscriber.h"
#include "client/lib/measurement_tally.h"
#include "slopecast/v1/insight.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "watch";

struct WatchOptions {
  KeyOptions keys;
  std::vector<std::string> configs;
  std::vector<std::string> measurements;  // default: io::kDefaultMeasurementsEndpoint
  double duration_s = 0.0;   // 0: until interrupted or count reached
  std::uint64_t count = 0;   // 0: no limit
  double interval_s = 1.0;
  double idle_timeout_s = 0.0;  // 0: wait forever for the first/next measurement
  std::string insight;          // the daemon's insight_out ("" : none)
  bool map = false;
};

// The latest insight reports seen.
struct InsightView {
  std::optional<v1::ModesReport> modes;
  std::optional<v1::TurbulenceReport> turbulence;
  std::optional<v1::ShadowReport> shadow;
  void take(const client::InsightMessage& m) {
    if (m.topic == "modes") modes.emplace().ParseFromString(m.payload);
    if (m.topic == "turbulence") turbulence.emplace().ParseFromString(m.payload);
    if (m.topic == "shadow") shadow.emplace().ParseFromString(m.payload);
  }
  std::string r0_text() const {
    if (!turbulence) return "r0: no report yet";
    const auto& t = *turbulence;
    if (!t.refused().empty()) return "r0: refused (" + t.refused() + ")";
    std::string out = fmt::format("r0 {:.1f} cm at 500 nm (seeing {:.2f}\"), from {} frames, {} pairs",
                                  100 * t.r0_500nm_m(), t.seeing_500nm_arcsec(), t.window_frames(), t.pairs());
    if (t.sensing_wavelength_nm() > 0)
      out += fmt::format("; at {:.0f} nm {:.1f} cm ({:.2f}\")", t.sensing_wavelength_nm(), 100 * t.r0_sensing_m(),
                         t.seeing_sensing_arcsec());
    if (t.r0_zernike_500nm_m() > 0) out += fmt::format("; from Zernike variances {:.1f} cm", 100 * t.r0_zernike_500nm_m());
    return out;
  }
  std::string modes_text(int leading = 6) const {
    if (!modes) return "modes: no report yet";
    const auto& m = *modes;
    if (!m.refused().empty()) return "modes: refused (" + m.refused() + ")";
    std::string out = "Zernike (nm rms)";
    for (int k = 0; k < m.coefficients_nm_size() && k < leading; ++k)
      out += fmt::format(" Z{} {:+.0f}", k + 2, m.coefficients_nm(k));
    out += fmt::format("; wavefront {:.0f} nm rms, {:.0f} without tip/tilt", m.wavefront_rms_nm(),
                       m.wavefront_rms_no_tilt_nm());
    if (m.strehl_wavelength_nm() > 0) out += fmt::format("; Strehl {:.2f} at {:.0f} nm", m.strehl(), m.strehl_wavelength_nm());
    return out;
  }
};

// One row of two characters per subaperture: the flux's level and either
// the slope's direction or why the subaperture is not valid.
std::string subaperture_map(const v1::Measurement& m) {
  const int nx = static_cast<int>(m.n_subap_x()), ny = static_cast<int>(m.n_subap_y());
  if (nx * ny != m.slope_x_size() || m.flux_adu_size() != m.slope_x_size()) return "(map: measurement incomplete)\n";
  float top = 0;
  for (float f : m.flux_adu()) top = std::max(top, f);
  static const char* kLevels = " .:*#";
  std::string out;
  for (int iy = 0; iy < ny; ++iy) {
    out += "  ";
    for (int ix = 0; ix < nx; ++ix) {
      const int i = iy * nx + ix;
      const float f = m.flux_adu(i);
      out += top > 0 && f > 0 ? kLevels[std::min(4, static_cast<int>(5 * f / top))] : ' ';
      const std::uint32_t flags = m.flags_size() > i ? m.flags(i) : 0;
      if (flags) {
        out += client::flag_letter(flags);
        continue;
      }
      const double sx = m.slope_x(i) / (m.units_per_px() > 0 ? m.units_per_px() : 1.0);
      const double sy = m.slope_y(i) / (m.units_per_px() > 0 ? m.units_per_px() : 1.0);
      if (std::hypot(sx, sy) < 0.25) {
        out += 'o';
        continue;
      }
      // Eight directions; +y is down the image.
      static const char* kArrows = ">\\v/<\\^/";
      const int dir = static_cast<int>(std::lround(std::atan2(sy, sx) / (M_PI / 4))) & 7;
      out += kArrows[dir];
    }
    out += "\n";
  }
  return out;
}

void print_summary(const client::TallySummary& s) {
  std::cout << fmt::format(
      "summary: {} measurements at {:.1f} Hz, {} frames missing from the sequence\n"
      "  latency camera -> watch   median {:.1f} us  p99 {:.1f} us\n"
      "  latency in daemon         median {:.1f} us  p99 {:.1f} us  (frame received -> measurement published)\n"
      "  slope rms                 x {:.4f} px  y {:.4f} px  (valid subapertures)\n"
      "  valid subapertures        {:.1f} of {} per frame\n",
      s.measurements, s.rate_hz, s.seq_gaps, s.end_to_end_median_us, s.end_to_end_p99_us, s.daemon_median_us,
      s.daemon_p99_us, s.slope_rms_x_px, s.slope_rms_y_px, s.mean_valid, s.subapertures);
}

// One daemon's stream: its subscriber and tallies.
struct Stream {
  std::string endpoint, label;
  std::unique_ptr<client::MeasurementSubscriber> sub;
  client::MeasurementTally total, interval;
};

void run_watch(WatchOptions o) {
  std::vector<std::string> labels;
  for (const auto& path : o.configs) {
    auto c = read_daemon_config(kCmd, path);
    if (!c) return;
    o.measurements.push_back(c->endpoints.measurements_out);
    labels.push_back(c->sensor_name.empty() ? path : c->sensor_name);
    if (c->insight.enabled && o.insight.empty() && o.configs.size() == 1) o.insight = c->endpoints.insight_out;
  }
  if (o.measurements.empty()) o.measurements.push_back(io::kDefaultMeasurementsEndpoint);
  for (const auto& e : o.measurements)
    if (!endpoint_ok(kCmd, "--measurements", e)) return;
  const bool several = o.measurements.size() > 1;
  if (several && (!o.insight.empty() || o.map))
    return fail(kCmd, "--insight and --map follow one daemon; give one --config or --measurements with them");
  zmq::context_t ctx(1);
  std::optional<client::CurveClient> curve;
  if (!load_keys(kCmd, o.keys, curve)) return;
  std::vector<Stream> streams(o.measurements.size());
  for (std::size_t k = 0; k < streams.size(); ++k) {
    streams[k].endpoint = o.measurements[k];
    streams[k].label = k < labels.size() ? labels[k] : std::string();
    streams[k].sub = std::make_unique<client::MeasurementSubscriber>(ctx, o.measurements[k], curve);
  }
  std::unique_ptr<client::InsightSubscriber> insight;
  if (!o.insight.empty()) {
    if (!endpoint_ok(kCmd, "--insight", o.insight)) return;
    insight = std::make_unique<client::InsightSubscriber>(ctx, o.insight,
                                                          std::vector<std::string>{"modes", "turbulence", "shadow"}, curve);
  }
  InsightView view;
  std::optional<v1::Measurement> latest;
  using clock = std::chrono::steady_clock;
  const auto start = clock::now();
  auto next_line = start + std::chrono::duration<double>(o.interval_s);
  auto last_seen = start;
  std::uint64_t count = 0;
  std::cout << "watching " << fmt::format("{}", fmt::join(o.measurements, ", "))
            << (o.duration_s > 0 ? fmt::format(" for {:.0f} s", o.duration_s) : "") << " (Ctrl-C to stop)\n";
  auto prefix = [&](const Stream& st) { return several ? fmt::format("[{}] ", st.label.empty() ? st.endpoint : st.label) : std::string(); };
  while (!stop_requested()) {
    const auto now = clock::now();
    if (o.duration_s > 0 && now - start >= std::chrono::duration<double>(o.duration_s)) break;
    if (o.count > 0 && count >= o.count) break;
    if (o.idle_timeout_s > 0 && now - last_seen >= std::chrono::duration<double>(o.idle_timeout_s)) {
      std::cerr << fmt::format("slopecast watch: no measurement for {:.1f} s\n", o.idle_timeout_s);
      exit_code() = 1;
      break;
    }
    if (now >= next_line) {
      for (auto& st : streams) {
        std::cout << prefix(st) << format_tally_line(st.interval.summary()) << "\n";
        st.interval.clear();
      }
      if (insight) std::cout << "    " << view.r0_text() << "\n    " << view.modes_text() << "\n";
      if (o.map && latest) std::cout << subaperture_map(*latest);
      std::cout << std::flush;
      next_line += std::chrono::duration_cast<clock::duration>(std::chrono::duration<double>(o.interval_s));
    }
    if (insight)
      while (auto r = insight->receive(std::chrono::milliseconds(0))) view.take(*r);
    bool any = false;
    for (auto& st : streams) {
      auto m = st.sub->receive(std::chrono::milliseconds(several ? 0 : 50));
      if (!m) continue;
      any = true;
      if (st.label.empty() && !m->sensor_name().empty()) st.label = m->sensor_name();
      if (o.map) latest = *m;
      const std::uint64_t t = client::wall_clock_ns();
      last_seen = clock::now();
      st.total.add(*m, t);
      st.interval.add(*m, t);
      ++count;
    }
    if (several && !any) std::this_thread::sleep_for(std::chrono::milliseconds(2));
  }
  if (stop_requested()) std::cout << "stopped by a signal\n";
  for (auto& st : streams) {
    if (several) std::cout << prefix(st);
    print_summary(st.total.summary());
    if (st.sub->malformed() > 0) std::cout << "  malformed messages skipped: " << st.sub->malformed() << "\n";
  }
  if (insight) {
    std::cout << "  " << view.r0_text() << "\n  " << view.modes_text() << "\n";
    if (view.shadow)
      std::cout << fmt::format("  shadow {}: shadow - live {:.4f} px rms over {} frames\n", view.shadow->centroider(),
                               view.shadow->overall_rms_px(), view.shadow->window_frames());
  }
  if (count == 0 && exit_code() == 0 && !stop_requested()) {
    std::cerr << "slopecast watch: received no measurement\n";
    exit_code() = 1;
  }
}

}  // namespace

void add_watch_command(CLI::App& app) {
  auto opts = std::make_shared<WatchOptions>();
  auto* cmd = app.add_subcommand("watch", "Print a live view of slopecastd's measurements and a summary");
  auto* config = cmd->add_option("--config", opts->configs,
                                 "Take the measurement endpoint from this slopecastd config file (repeat to follow "
                                 "several daemons: one line per sensor, named by its [daemon] sensor_name)")
                    ->check(CLI::ExistingFile);
  cmd->add_option("--measurements", opts->measurements,
                  fmt::format("Daemon measurement endpoint (default {}; repeat for several daemons)",
                              io::kDefaultMeasurementsEndpoint))
      ->excludes(config);
  cmd->add_option("--duration-s", opts->duration_s, "Stop after this many seconds (0: no limit)")
      ->check(CLI::NonNegativeNumber);
  cmd->add_option("--count", opts->count, "Stop after this many measurements (0: no limit)");
  cmd->add_option("--interval-s", opts->interval_s, "Seconds between live lines")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--idle-timeout-s", opts->idle_timeout_s,
                  "Fail if no measurement arrives for this many seconds (0: wait forever)")
      ->check(CLI::NonNegativeNumber);
  cmd->add_option("--insight", opts->insight,
                  "Also follow the daemon's insight reports on this endpoint (r0, seeing, Zernike terms, shadow); "
                  "taken from --config when its [insight] is enabled");
  cmd->add_flag("--map", opts->map,
                "Print a map of the subapertures with each line: two characters each, the flux level ( .:*# from "
                "dark to the brightest) then the slope's direction (> v < ^ and diagonals \\ / for 0.25 px and "
                "more, o below) or, for an invalid subaperture, why: " + client::flag_legend());
  add_key_options(cmd, opts->keys);
  cmd->callback([opts] { run_watch(*opts); });
}

}  // namespace slopecast::cli
