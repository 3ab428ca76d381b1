// Lenslet-grid conventions and validation.
#include <catch2/catch.hpp>

#include "daemon/core/geometry/sensor_geometry.h"

using namespace slopecast::core;

TEST_CASE("subaperture boxes and zero points follow the stated convention", "[geometry]") {
  // sensor_geometry.h: box (ix, iy) starts at origin + ix*pitch; zero point is
  // origin + (ix + 1/2) pitch - 1/2. Worked example: origin 3, pitch 15,
  // ix 2 -> box columns 33..47, centre 40.
  const LensletGrid g{4, 3, 15, 3, 5};
  CHECK(g.count() == 12);
  CHECK(g.box_x0(2) == 33);
  CHECK(g.zero_x(2) == 40.0);
  CHECK(g.box_y0(1) == 20);
  CHECK(g.zero_y(1) == 27.0);
  // Even pitch: the centre lies between two pixels.
  const LensletGrid even{2, 2, 10, 0, 0};
  CHECK(even.zero_x(0) == 4.5);
}

TEST_CASE("a grid must fit inside the camera", "[geometry]") {
  const CameraSpec cam{240, 240, PixelFormat::kU16};
  CHECK(validate(LensletGrid{16, 16, 15, 0, 0}, cam).empty());
  const std::string too_wide = validate(LensletGrid{16, 16, 15, 1, 0}, cam);
  CHECK_THAT(too_wide, Catch::Contains("241 columns") && Catch::Contains("width_px is 240"));
  CHECK_THAT(validate(LensletGrid{16, 17, 15, 0, 0}, cam), Catch::Contains("rows"));
  CHECK_THAT(validate(LensletGrid{0, 16, 15, 0, 0}, cam), Catch::Contains("subapertures_x"));
  CHECK_THAT(validate(LensletGrid{16, 16, 1, 0, 0}, cam), Catch::Contains("pitch_px"));
  CHECK_THAT(validate(LensletGrid{4, 4, 8, -1, 0}, cam), Catch::Contains("origin_x_px"));
}

TEST_CASE("camera sizes are bounded", "[geometry]") {
  CHECK(validate(CameraSpec{240, 240, PixelFormat::kU8}).empty());
  CHECK_THAT(validate(CameraSpec{0, 240, PixelFormat::kU8}), Catch::Contains("width_px"));
  CHECK_THAT(validate(CameraSpec{240, 20000, PixelFormat::kU8}), Catch::Contains("height_px"));
}
