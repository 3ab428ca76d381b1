// Fuzz target: a control request's bytes, parsed as slopecastd parses them,
// then taken through what the daemon does with each command short of
// touching its sockets or files: centroider options applied and the whole
// checked; acquisitions started on a calibration session; set names
// checked.
#include <cstdint>

#include "daemon/app/calibration_session.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"

using namespace slopecast;

extern "C" int LLVMFuzzerTestOneInput(const std::uint8_t* data, std::size_t size) {
  v1::ControlRequest req;
  if (!req.ParseFromArray(data, static_cast<int>(size))) return 0;
  core::PipelineSettings s;
  s.camera = {40, 40, core::PixelFormat::kU16};
  s.grid = {4, 4, 10, 0, 0};
  if (req.has_set_centroider()) {
    for (const auto& o : req.set_centroider().options()) {
      const auto value = io::from_wire(o);
      if (!value) return 0;
      if (!core::apply_option(s.centroider, o.key(), *value).empty()) return 0;
    }
    (void)core::validate(s);
  }
  if (req.has_calibration()) {
    app::CalibrationSession session("/nonexistent/calibrations", "regular grid", std::nullopt, {});
    const auto& c = req.calibration();
    if (c.has_start()) (void)session.start(c.start(), s, 1);
    (void)session.cancel();
    (void)app::check_set_name(c.save());
    (void)app::check_set_name(c.load());
    v1::CalibrationReply out;
    session.describe(s, out);
  }
  return 0;
}
