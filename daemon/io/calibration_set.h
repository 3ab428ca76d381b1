// A calibration set on disk: a folder of FITS files anyone can open, plus a
// small TOML manifest that says what is there and where it came from.
//
//   <set>/calibration.toml       manifest (format, camera, grid shape,
//                                lattice fit, and per file: when, from how
//                                many frames, at what exposure, by what
//                                command)
//   <set>/layout.fits            binary table LAYOUT: X0 Y0 WIDTH HEIGHT
//                                (px, integers) REF_X REF_Y (px), one row
//                                per subaperture in index order
//   <set>/valid_map.fits         n_x x n_y, BITPIX 8: 1 in, 0 out
//   <set>/reference_slopes.fits  n_x x n_y x 2, BITPIX -32: plane 1 x,
//                                plane 2 y, px
//   <set>/dark.fits              camera-sized, BITPIX -32, ADU
//   <set>/sky.fits               camera-sized, BITPIX -32, ADU (dark removed)
//   <set>/flat.fits              camera-sized, BITPIX -32, mean 1 over the pupil
//   <set>/bad_pixels.fits        camera-sized, BITPIX 8: BadPixelKind bits
//
// Only the layout is required. Each FITS header carries DATE, NCOMBINE
// (frames averaged), EXPTIME (s, when known) and the command as HISTORY.
//
// Saving writes the whole set into "<set>.partial", then swaps it in
// ("<set>" moves to "<set>.previous" for the instant of the swap), so a
// reader -- or a daemon restarting after a kill -- sees the old set or the
// new one, never a mixture or a half-written file. Loading checks every
// file against the manifest and the camera and names the first mismatch.
#pragma once

#include <cstdint>
#include <filesystem>
#include <map>
#include <optional>
#include <string>
#include <variant>
#include <vector>

#include "daemon/core/geometry/registration.h"
#include "daemon/core/pipeline/pipeline.h"

namespace slopecast::io {

inline constexpr const char* kCalibrationManifest = "calibration.toml";

struct Provenance {
  std::string created_utc;  // ISO 8601, e.g. 2026-12-02T07:30:00Z
  long frames = 0;          // frames averaged; 0 when not made from frames
  double exposure_s = 0.0;  // the frames' exposure; 0 unknown
  std::string command;      // what made it, for a human
};

struct CalibrationSet {
  int camera_width_px = 0;
  int camera_height_px = 0;
  core::LensletGrid grid;  // shape and box side (origin unused)
  std::vector<core::SubapertureBox> layout;
  std::vector<std::uint8_t> valid_map;                            // empty: all in
  std::vector<float> reference_slope_x_px, reference_slope_y_px;  // empty: none
  std::vector<float> dark_adu;                                    // empty: none
  std::vector<float> sky_adu;                                     // empty: none
  std::vector<float> flat;                                        // empty: none
  std::vector<std::uint8_t> bad_pixels;                           // empty: none
  std::optional<core::LatticeFit> lattice;                        // when registered
  // By product: "layout", "valid_map", "reference_slopes", "dark", "sky",
  // "flat", "bad_pixels".
  std::map<std::string, Provenance> made;
};

// The calibration in force in a pipeline's settings (the layout resolved
// from the grid when it has none).
CalibrationSet calibration_of(const core::PipelineSettings& s);

// Puts the set into settings (grid shape, layout, maps, slopes, frames).
// Empty when the result validates; otherwise why not, and settings is left
// unchanged.
std::string apply_calibration(const CalibrationSet& set, core::PipelineSettings& settings);

std::string save_calibration_set(const CalibrationSet& set, const std::filesystem::path& dir);

// camera: the one the set must fit (width and height checked).
std::variant<CalibrationSet, std::string> load_calibration_set(const std::filesystem::path& dir,
                                                               const core::CameraSpec& camera);

// A layout written by hand: a CSV file with the header line
// "x0,y0,width,height,ref_x,ref_y" and one line per subaperture in index
// order, or a FITS file with a LAYOUT table as in a calibration set. The
// caller checks it against the grid (core::validate_layout).
std::variant<std::vector<core::SubapertureBox>, std::string> read_layout_file(const std::filesystem::path& path);

// Now, as ISO 8601 UTC to the second.
std::string utc_now_iso();

}  // namespace slopecast::io
