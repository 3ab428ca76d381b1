// `slopecast snap`: one annotated picture of what the daemon sees, from its
// preview topic (proto/slopecast/v1/insight.proto, Preview), written as a
// PNG through OpenCV at the camera's size.
//
// What is drawn (our own colours, BGR):
//   the frame in grey, stretched between its 1st and 99.8th percentiles;
//   each box: green when valid, red when flagged (with the reason's letter,
//   see client/lib/flag_letters.h), dark grey when masked (outside the
//   valid map);
//   each valid spot: a yellow cross at the measured position (reference
//   point + slope);
//   each valid slope: a cyan line from the reference point to the spot,
//   lengthened by --arrow-gain.
// A legend sits in the bottom-right corner of pictures of 480 x 240 px and
// more (--scale enlarges small cameras' pictures; --no-legend leaves it out).
#include <cmath>
#include <iostream>

#include <fmt/format.h>
#include <opencv2/imgcodecs.hpp>
#include <opencv2/imgproc.hpp>
#include <zmq.hpp>

#include "client/cli/commands.h"
#include "client/lib/flag_letters.h"
#include "client/lib/insight_subscriber.h"
#include "slopecast/v1/insight.pb.h"
#include "slopecast/v1/measurement.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "snap";

struct SnapOptions {
  std::string config;
  std::string insight;
  std::string out;
  double timeout_s = 10;
  double arrow_gain = 3;
  int scale = 1;
  bool no_legend = false;
  KeyOptions keys;
};

const cv::Scalar kValid(0, 170, 0), kFlagged(40, 40, 230), kMasked(90, 90, 90), kSpot(0, 255, 255),
    kArrow(255, 255, 0), kText(255, 255, 255);

void run_snap(SnapOptions o) {
  if (!o.config.empty()) {
    auto c = read_daemon_config(kCmd, o.config);
    if (!c) return;
    if (!c->insight.enabled) return fail(kCmd, o.config + " has no [insight] enabled = true: the daemon makes no previews");
    if (c->insight.preview_rate_hz <= 0) return fail(kCmd, o.config + ": [insight] preview_rate_hz is 0 (no previews)");
    if (o.insight.empty()) o.insight = c->endpoints.insight_out;
  }
  if (o.insight.empty()) return fail(kCmd, "give --config or --insight (the daemon's insight_out endpoint)");
  if (!endpoint_ok(kCmd, "--insight", o.insight)) return;
  std::optional<client::CurveClient> curve;
  if (!load_keys(kCmd, o.keys, curve)) return;
  zmq::context_t ctx(1);
  client::InsightSubscriber sub(ctx, o.insight, {"preview"}, curve);
  auto got = sub.receive(std::chrono::milliseconds(static_cast<long>(o.timeout_s * 1000)));
  if (!got) {
    if (stop_requested()) return;
    return fail(kCmd, fmt::format("no preview from {} within {} s (is the daemon receiving frames?)", o.insight,
                                  o.timeout_s));
  }
  v1::Preview p;
  v1::Measurement m;
  if (!p.ParseFromString(got->payload) || !m.ParseFromString(p.measurement()))
    return fail(kCmd, "the preview does not parse");
  const int bin = static_cast<int>(std::max(1u, p.binning()));
  const int pw = static_cast<int>(p.width_px()), ph = static_cast<int>(p.height_px());
  if (p.pixels_size() != pw * ph || pw <= 0) return fail(kCmd, "the preview's pixels do not match its size");
  // Grey image at camera size (binned previews are scaled back up).
  cv::Mat raw(ph, pw, CV_32F);
  for (int y = 0; y < ph; ++y)
    for (int x = 0; x < pw; ++x) raw.at<float>(y, x) = p.pixels(y * pw + x);
  std::vector<float> sorted(p.pixels().begin(), p.pixels().end());
  std::sort(sorted.begin(), sorted.end());
  const float lo = sorted[sorted.size() / 100], hi = std::max(lo + 1e-3f, sorted[sorted.size() * 998 / 1000]);
  cv::Mat grey;
  raw.convertTo(grey, CV_8U, 255.0 / (hi - lo), -lo * 255.0 / (hi - lo));
  const int k = bin * o.scale;  // image px per preview px
  if (k > 1) cv::resize(grey, grey, cv::Size(pw * k, ph * k), 0, 0, cv::INTER_NEAREST);
  // Camera pixel x covers [x - 1/2, x + 1/2]; in the picture that is
  // [x * scale, (x + 1) * scale), so a camera coordinate maps to:
  const double sc = o.scale;
  auto at = [&](double x, double y) {
    return cv::Point(static_cast<int>(std::lround((x + 0.5) * sc - 0.5)), static_cast<int>(std::lround((y + 0.5) * sc - 0.5)));
  };
  cv::Mat img;
  cv::cvtColor(grey, img, cv::COLOR_GRAY2BGR);
  const int n = p.box_x0_size();
  const double units = m.units_per_px() > 0 ? m.units_per_px() : 1.0;
  for (int i = 0; i < n && i < m.slope_x_size(); ++i) {
    const std::uint32_t flags = i < m.flags_size() ? m.flags(i) : 0;
    const cv::Rect box(p.box_x0(i) * o.scale, p.box_y0(i) * o.scale, p.box_width(i) * o.scale,
                       p.box_height(i) * o.scale);
    const bool masked = flags & 2048u;
    cv::rectangle(img, box, flags == 0 ? kValid : masked ? kMasked : kFlagged, 1);
    if (flags) {
      if (!masked && box.width >= 8)
        cv::putText(img, std::string(1, client::flag_letter(flags)), {box.x + 2, box.y + box.height - 3},
                    cv::FONT_HERSHEY_PLAIN, 0.7, kFlagged, 1);
      continue;
    }
    // Pixel (x, y) covers [x - 1/2, x + 1/2]: reference points are in those
    // coordinates, so a point maps to the pixel lround(x).
    const double rx = p.ref_x(i), ry = p.ref_y(i);
    const double sx = rx + m.slope_x(i) / units, sy = ry + m.slope_y(i) / units;
    cv::line(img, at(rx, ry), at(rx + o.arrow_gain * (sx - rx), ry + o.arrow_gain * (sy - ry)), kArrow, 1);
    const cv::Point spot = at(sx, sy);
    const int arm = std::max(1, o.scale);
    cv::line(img, spot - cv::Point(arm, 0), spot + cv::Point(arm, 0), kSpot, 1);
    cv::line(img, spot - cv::Point(0, arm), spot + cv::Point(0, arm), kSpot, 1);
  }
  cv::Rect legend_box;
  if (!o.no_legend && img.cols >= 480 && img.rows >= 240) {
    const std::vector<std::pair<cv::Scalar, std::string>> rows = {
        {kValid, "box: valid"}, {kFlagged, "box: flagged (letter = why)"}, {kMasked, "box: masked"},
        {kSpot, "+ spot"}, {kArrow, fmt::format("- slope x{:g}", o.arrow_gain)}};
    const int h = 14 * static_cast<int>(rows.size()) + 6, w = 230;
    legend_box = cv::Rect(img.cols - w - 2, img.rows - h - 2, w, h);
    cv::Mat roi = img(legend_box);
    roi *= 0.25;
    for (std::size_t k = 0; k < rows.size(); ++k)
      cv::putText(img, rows[k].second, {legend_box.x + 5, legend_box.y + 14 * static_cast<int>(k + 1)},
                  cv::FONT_HERSHEY_PLAIN, 0.9, rows[k].first, 1);
  }
  if (!cv::imwrite(o.out, img)) return fail(kCmd, "cannot write '" + o.out + "'");
  std::cout << fmt::format("wrote {} ({} x {} px) of frame seq {}: {} valid of {} subapertures{}\n", o.out, img.cols,
                           img.rows, p.frame_seq(), m.n_valid(), n,
                           legend_box.area() ? fmt::format("; legend at x {}..{}, y {}..{}", legend_box.x,
                                                           legend_box.x + legend_box.width - 1, legend_box.y,
                                                           legend_box.y + legend_box.height - 1)
                                             : "");
}

}  // namespace

void add_snap_command(CLI::App& app) {
  auto o = std::make_shared<SnapOptions>();
  auto* cmd = app.add_subcommand(
      "snap",
      "Write one annotated PNG of the daemon's view (needs [insight] with previews): boxes green = valid, red = "
      "flagged with the reason's letter (" + client::flag_legend() + "), dark grey = masked; yellow + = spot; "
      "cyan line = slope (lengthened by --arrow-gain)");
  cmd->add_option("--config", o->config, "Take the insight endpoint from this slopecastd config")->check(CLI::ExistingFile);
  cmd->add_option("--insight", o->insight, "The daemon's insight_out endpoint");
  cmd->add_option("--out", o->out, "PNG file to write")->required();
  cmd->add_option("--timeout-s", o->timeout_s, "Wait this long for a preview")->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--arrow-gain", o->arrow_gain, "Slope lines drawn this many times their length")
      ->capture_default_str()->check(CLI::PositiveNumber);
  cmd->add_option("--scale", o->scale, "Picture px per camera px (1: the camera's size)")
      ->capture_default_str()->check(CLI::Range(1, 16));
  cmd->add_flag("--no-legend", o->no_legend,
                "Leave the legend out (it is drawn in the bottom-right corner when the picture is at least 480 x "
                "240 px)");
  add_key_options(cmd, o->keys);
  cmd->callback([o] { run_snap(*o); });
}

}  // namespace slopecast::cli
