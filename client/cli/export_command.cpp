// `slopecast export`: a recording's frames to a FITS cube (plus a binary
// table of seq numbers and times), its measurements to CSV and/or a FITS
// binary table.
#include <fstream>
#include <iostream>

#include <fmt/format.h>

#include "client/cli/commands.h"
#include "daemon/io/recording.h"
#include "daemon/io/fits_image.h"
#include "daemon/io/wire_codec.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/measurement.pb.h"
#include "slopecast/v1/recording.pb.h"

namespace slopecast::cli {

namespace {

constexpr const char* kCmd = "export";
constexpr std::uint64_t kMaxCubeBytes = 4ull << 30;

struct ExportOptions {
  std::vector<std::string> inputs;
  std::string fits_cube;
  std::string measurements_csv;
  std::string measurements_fits;
  std::string truth_csv;
  std::uint64_t first = 0, count = 0;
};

void run_export(const ExportOptions& o) {
  if (o.fits_cube.empty() && o.measurements_csv.empty() && o.measurements_fits.empty() && o.truth_csv.empty())
    return fail(kCmd, "nothing to export: give --fits-cube, --measurements-csv, --measurements-fits and/or --truth-csv");
  for (const auto& out : {o.fits_cube, o.measurements_csv, o.measurements_fits, o.truth_csv})
    if (!out.empty() && std::filesystem::exists(out))
      return fail(kCmd, fmt::format("'{}' exists; choose a new name (nothing is overwritten)", out));
  // Frames.
  int width = 0, height = 0;
  core::PixelFormat format = core::PixelFormat::kU16;
  std::vector<std::byte> pixels;
  std::vector<double> seqs, camera_ns, received_ns;
  std::uint64_t frame_index = 0, problems = 0;
  // Measurements, one row per subaperture.
  std::ofstream csv;
  if (!o.measurements_csv.empty()) {
    csv.open(o.measurements_csv);
    if (!csv) return fail(kCmd, fmt::format("cannot write '{}'", o.measurements_csv));
    csv << "frame_seq,camera_time_ns,subaperture,slope_x,slope_y,flux_adu,peak_adu,valid,flags\n";
  }
  std::ofstream truth;
  std::uint64_t truths = 0;
  if (!o.truth_csv.empty()) {
    truth.open(o.truth_csv);
    if (!truth) return fail(kCmd, fmt::format("cannot write '{}'", o.truth_csv));
    truth << "frame_seq,subaperture,true_dx_px,true_dy_px,illuminated\n";
  }
  std::vector<io::FitsColumn> table{{"FRAME_SEQ", true, "", {}},  {"CAMERA_TIME_NS", true, "ns", {}},
                                    {"SUBAP", true, "", {}},      {"SLOPE_X", false, "", {}},
                                    {"SLOPE_Y", false, "", {}},   {"FLUX", false, "adu", {}},
                                    {"PEAK", false, "adu", {}},   {"VALID", true, "", {}},
                                    {"FLAGS", true, "", {}}};
  std::string slope_unit;
  std::uint64_t measurements = 0;
  for (const auto& path : o.inputs) {
    auto opened = io::RecordingReader::open(path);
    if (auto* e = std::get_if<std::string>(&opened)) return fail(kCmd, *e);
    auto& reader = *std::get<std::unique_ptr<io::RecordingReader>>(opened);
    io::RecordedMessage m;
    for (io::ReadOutcome r; (r = reader.next(m)) != io::ReadOutcome::kEnd;) {
      if (stop_requested()) return;
      if (r != io::ReadOutcome::kRecord) {
        std::cerr << "slopecast export: warning: " << reader.problem() << "\n";
        ++problems;
        continue;
      }
      if (m.kind == io::RecordKind::kFrame && !o.fits_cube.empty()) {
        v1::FrameHeader h;
        if (m.parts.size() != 2 || !h.ParseFromString(m.parts[0])) continue;
        const std::uint64_t i = frame_index++;
        if (i < o.first || (o.count && i >= o.first + o.count)) continue;
        const auto f = io::from_wire(h.pixel_type());
        if (!f) return fail(kCmd, fmt::format("frame seq {} has an unknown pixel type", h.seq()));
        const std::size_t row = h.width_px() * core::bytes_per_pixel(*f);
        const std::size_t stride = h.row_stride_bytes() ? h.row_stride_bytes() : row;
        if (m.parts[1].size() != stride * h.height_px() || stride < row)
          return fail(kCmd, fmt::format("frame seq {}: {} pixel bytes do not match its header", h.seq(),
                                        m.parts[1].size()));
        if (seqs.empty()) {
          width = static_cast<int>(h.width_px());
          height = static_cast<int>(h.height_px());
          format = *f;
        } else if (static_cast<int>(h.width_px()) != width || static_cast<int>(h.height_px()) != height ||
                   *f != format) {
          return fail(kCmd, fmt::format("frame seq {} is {} x {} {}, the first was {} x {} {}: a cube holds one "
                                        "geometry (export the parts separately with --first/--count)",
                                        h.seq(), h.width_px(), h.height_px(), core::pixel_format_name(*f), width,
                                        height, core::pixel_format_name(format)));
        }
        if (pixels.size() + row * height > kMaxCubeBytes)
          return fail(kCmd, "the cube would exceed 4 GiB: export it in parts with --first/--count");
        const auto* src = reinterpret_cast<const std::byte*>(m.parts[1].data());
        for (std::uint32_t y = 0; y < h.height_px(); ++y)
          pixels.insert(pixels.end(), src + y * stride, src + y * stride + row);
        seqs.push_back(static_cast<double>(h.seq()));
        camera_ns.push_back(static_cast<double>(h.camera_time_ns()));
        received_ns.push_back(static_cast<double>(m.received_ns));
      } else if (m.kind == io::RecordKind::kTruth && truth.is_open()) {
        v1::FrameTruth t;
        if (m.parts.size() != 1 || !t.ParseFromString(m.parts[0])) continue;
        ++truths;
        for (int s = 0; s < t.true_dx_px_size() && s < t.true_dy_px_size(); ++s)
          truth << fmt::format("{},{},{:.6f},{:.6f},{:.4f}\n", t.frame_seq(), s, t.true_dx_px(s), t.true_dy_px(s),
                               s < t.illuminated_size() ? t.illuminated(s) : 1.0f);
      } else if (m.kind == io::RecordKind::kMeasurement &&
                 (!o.measurements_csv.empty() || !o.measurements_fits.empty())) {
        v1::Measurement meas;
        if (m.parts.size() != 1 || !meas.ParseFromString(m.parts[0])) continue;
        ++measurements;
        slope_unit = v1::SlopeUnit_Name(meas.slope_unit());
        const int n = meas.slope_x_size();
        for (int s = 0; s < n; ++s) {
          const double flux = s < meas.flux_adu_size() ? meas.flux_adu(s) : 0.0;
          const double peak = s < meas.peak_adu_size() ? meas.peak_adu(s) : 0.0;
          const bool valid = s < meas.valid_size() && meas.valid(s);
          const unsigned flags = s < meas.flags_size() ? meas.flags(s) : 0u;
          if (csv.is_open())
            csv << fmt::format("{},{},{},{},{},{},{},{},{}\n", meas.frame_seq(), meas.camera_time_ns(), s,
                               meas.slope_x(s), meas.slope_y(s), flux, peak, valid ? 1 : 0, flags);
          if (!o.measurements_fits.empty()) {
            const double row[] = {double(meas.frame_seq()), double(meas.camera_time_ns()), double(s),
                                  meas.slope_x(s), meas.slope_y(s), flux, peak, valid ? 1.0 : 0.0, double(flags)};
            for (std::size_t c = 0; c < table.size(); ++c) table[c].values.push_back(row[c]);
          }
        }
      }
    }
  }
  if (!o.fits_cube.empty()) {
    if (seqs.empty()) return fail(kCmd, "the recording holds no frames to put in a cube");
    io::FitsHeader header;
    header.cards.push_back({"ORIGIN", std::string("slopecast export"), "software that wrote this file"});
    header.history.push_back("frames of " + fmt::format("{}", fmt::join(o.inputs, ", ")));
    const std::vector<io::FitsColumn> columns{{"FRAME_SEQ", true, "", seqs},
                                              {"CAMERA_TIME_NS", true, "ns", camera_ns},
                                              {"RECEIVED_NS", true, "ns", received_ns}};
    if (auto e = io::write_fits_frames(o.fits_cube, width, height, static_cast<int>(seqs.size()), format, pixels,
                                       header, "FRAMES", columns);
        !e.empty())
      return fail(kCmd, e);
    std::cout << fmt::format("wrote {} frames of {} x {} {} to {} (table FRAMES: seq and times)\n", seqs.size(),
                             width, height, core::pixel_format_name(format), o.fits_cube);
  }
  if (truth.is_open()) {
    truth.close();
    std::cout << fmt::format("wrote the truth of {} frames to {}\n", truths, o.truth_csv);
  }
  if (csv.is_open()) {
    csv.close();
    std::cout << fmt::format("wrote {} measurements to {}\n", measurements, o.measurements_csv);
  }
  if (!o.measurements_fits.empty()) {
    io::FitsHeader header;
    header.cards.push_back({"SLOPEUNI", slope_unit, "unit of SLOPE_X and SLOPE_Y"});
    for (auto& c : table)
      if (c.name.rfind("SLOPE", 0) == 0) c.unit = slope_unit;
    if (auto e = io::write_fits_table(o.measurements_fits, "MEASUREMENTS", table, header); !e.empty())
      return fail(kCmd, e);
    std::cout << fmt::format("wrote {} measurements to {} (table MEASUREMENTS, one row per subaperture)\n",
                             measurements, o.measurements_fits);
  }
  if (problems) {
    std::cout << fmt::format("{} damaged or torn record(s) skipped (warnings above)\n", problems);
    exit_code() = 1;
  }
}

}  // namespace

void add_export_command(CLI::App& app) {
  auto o = std::make_shared<ExportOptions>();
  auto* cmd = app.add_subcommand("export", "Export a recording: frames to a FITS cube, measurements to CSV or FITS");
  cmd->add_option("inputs", o->inputs, "Recording files, in order")->required()->check(CLI::ExistingFile);
  cmd->add_option("--fits-cube", o->fits_cube,
                  "Frames to this FITS cube in their own pixel type, with a FRAMES table (seq, camera and receive "
                  "times)");
  cmd->add_option("--measurements-csv", o->measurements_csv,
                  "Measurements to CSV, one row per subaperture (frame_seq,camera_time_ns,subaperture,slope_x,"
                  "slope_y,flux_adu,peak_adu,valid,flags)");
  cmd->add_option("--measurements-fits", o->measurements_fits,
                  "Measurements to a FITS binary table MEASUREMENTS, one row per subaperture");
  cmd->add_option("--truth-csv", o->truth_csv,
                  "A simulator's truth (recorded with --truth-from) to CSV: frame_seq,subaperture,true_dx_px,"
                  "true_dy_px,illuminated");
  cmd->add_option("--first", o->first, "Frames: skip this many first")->capture_default_str();
  cmd->add_option("--count", o->count, "Frames: at most this many (0: all)")->capture_default_str();
  cmd->callback([o] { run_export(*o); });
}

}  // namespace slopecast::cli
