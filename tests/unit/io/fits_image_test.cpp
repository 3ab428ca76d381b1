// FITS images, checked against FITS Standard 4.0 byte by byte.
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <filesystem>
#include <fstream>
#include <iterator>

#include <fitsio.h>

#include "daemon/io/fits_image.h"
#include "tests/support/temp_dir.h"

using namespace slopecast;
namespace fs = std::filesystem;

namespace {

// One directory for this test program, removed at exit.
fs::path temp_path(const std::string& name) {
  static const slopecast::testing::TempDir dir;
  return dir / name;
}

std::string slurp(const fs::path& p) {
  std::ifstream in(p, std::ios::binary);
  return {std::istreambuf_iterator<char>(in), {}};
}

}  // namespace

TEST_CASE("a written float image follows the FITS layout", "[fits]") {
  const fs::path p = temp_path("layout.fits");
  const int w = 5, h = 3;
  std::vector<float> px(w * h);
  for (int i = 0; i < w * h; ++i) px[i] = 0.5f * i - 1.0f;
  REQUIRE(io::write_fits_image(p, w, h, px).empty());
  const std::string bytes = slurp(p);
  // FITS 4.0 sec. 3.1/4.1: 2880-byte blocks of 80-character cards;
  // the mandatory keywords come first, in order.
  CHECK(bytes.size() % 2880 == 0);
  CHECK(bytes.substr(0, 30) == "SIMPLE  =                    T");
  CHECK(bytes.substr(80, 30) == "BITPIX  =                  -32");
  CHECK(bytes.substr(160, 30) == "NAXIS   =                    2");
  CHECK(bytes.substr(240, 30) == "NAXIS1  =                    5");  // NAXIS1 = x = width
  CHECK(bytes.substr(320, 30) == "NAXIS2  =                    3");
  // Data start at the first block after END; big-endian IEEE floats, axis 1
  // fastest (FITS 4.0 sec. 5.3), so the 2nd value is pixel (x=1, y=0).
  const std::size_t end = bytes.find("END     ");
  REQUIRE(end != std::string::npos);
  const std::size_t data = (end / 2880 + 1) * 2880;
  auto be_float = [&](std::size_t k) {
    unsigned char b[4];
    std::memcpy(b, bytes.data() + data + 4 * k, 4);
    const std::uint32_t u = (std::uint32_t(b[0]) << 24) | (b[1] << 16) | (b[2] << 8) | b[3];
    float f;
    std::memcpy(&f, &u, 4);
    return f;
  };
  CHECK(be_float(0) == -1.0f);
  CHECK(be_float(1) == -0.5f);
  CHECK(be_float(w) == px[w]);  // first pixel of row 1
  CHECK(bytes.size() == data + 2880);  // 60 bytes of data, padded to a block
}

TEST_CASE("a float image reads back exactly, with its extra cards", "[fits]") {
  const fs::path p = temp_path("round trip [1].fits");  // brackets must not be cfitsio syntax
  std::vector<float> px = {1.5f, -2.25f, 3e4f, 0.0f, 7.0f, 8.0f};
  const io::FitsCard cards[] = {{"NCOMBINE", 100, "frames averaged"}};
  REQUIRE(io::write_fits_image(p, 3, 2, px, cards, "made by a test").empty());
  auto r = io::read_fits_image(p);
  REQUIRE(std::holds_alternative<io::FitsImage>(r));
  const auto& img = std::get<io::FitsImage>(r);
  CHECK(img.width == 3);
  CHECK(img.height == 2);
  CHECK(img.pixels == px);
  // An integer card: the value right-justified in columns 11-30 (FITS 4.0
  // sec. 4.2.3, fixed format).
  CHECK(slurp(p).find("NCOMBINE=                  100 / frames averaged") != std::string::npos);
}

TEST_CASE("unsigned 16-bit images are read through BZERO = 32768", "[fits]") {
  // FITS 4.0 Table 11 / sec. 5.2.5: u16 is stored as BITPIX = 16 with
  // BZERO = 32768; physical = BZERO + stored. Written here by cfitsio itself
  // (the reference implementation) as USHORT_IMG.
  const fs::path p = temp_path("u16.fits");
  fs::remove(p);
  int status = 0;
  fitsfile* f = nullptr;
  const std::string name = p.string();
  fits_create_file(&f, name.c_str(), &status);
  long naxes[2] = {2, 2};
  fits_create_img(f, USHORT_IMG, 2, naxes, &status);
  unsigned short v[4] = {0, 1, 32768, 65535};
  long first[2] = {1, 1};
  fits_write_pix(f, TUSHORT, first, 4, v, &status);
  fits_close_file(f, &status);
  REQUIRE(status == 0);
  const std::string bytes = slurp(p);
  CHECK(bytes.find("BZERO   =                32768") != std::string::npos);
  const std::size_t data = (bytes.find("END     ") / 2880 + 1) * 2880;
  // Stored bits = value XOR 0x8000, big-endian (FITS 4.0 sec. 5.2.5 check values):
  // 0 -> 0x8000, 65535 -> 0x7FFF.
  CHECK(static_cast<unsigned char>(bytes[data]) == 0x80);
  CHECK(static_cast<unsigned char>(bytes[data + 1]) == 0x00);
  CHECK(static_cast<unsigned char>(bytes[data + 6]) == 0x7F);
  CHECK(static_cast<unsigned char>(bytes[data + 7]) == 0xFF);
  auto r = io::read_fits_image(p);
  REQUIRE(std::holds_alternative<io::FitsImage>(r));
  CHECK(std::get<io::FitsImage>(r).pixels == std::vector<float>{0.0f, 1.0f, 32768.0f, 65535.0f});
}

TEST_CASE("unusable FITS files are refused with a reason", "[fits]") {
  SECTION("missing file") {
    auto r = io::read_fits_image(temp_path("nope.fits"));
    REQUIRE(std::holds_alternative<io::FitsError>(r));
    CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("no such file"));
  }
  SECTION("not a FITS file") {
    const fs::path p = temp_path("text.fits");
    std::ofstream(p) << "this is not FITS\n";
    auto r = io::read_fits_image(p);
    REQUIRE(std::holds_alternative<io::FitsError>(r));
    CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("text.fits"));
  }
  SECTION("a cube of several frames") {
    const fs::path p = temp_path("cube.fits");
    fs::remove(p);
    int status = 0;
    fitsfile* f = nullptr;
    fits_create_file(&f, p.string().c_str(), &status);
    long naxes[3] = {2, 2, 2};
    fits_create_img(f, FLOAT_IMG, 3, naxes, &status);
    float v[8] = {};
    long first[3] = {1, 1, 1};
    fits_write_pix(f, TFLOAT, first, 8, v, &status);
    fits_close_file(f, &status);
    REQUIRE(status == 0);
    auto r = io::read_fits_image(p);
    REQUIRE(std::holds_alternative<io::FitsError>(r));
    CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("a cube of 2 planes"));
  }
  SECTION("a NaN pixel") {
    const fs::path p = temp_path("nan.fits");
    std::vector<float> px = {1, 2, std::nanf(""), 4};
    // slopecast refuses to write it (a calibration with holes is not one) ...
    CHECK_THAT(io::write_fits_image(p, 2, 2, px), Catch::Contains("NaN"));
    // ... so another writer makes it.
    fs::remove(p);
    int status = 0;
    fitsfile* f = nullptr;
    fits_create_file(&f, p.string().c_str(), &status);
    long naxes[2] = {2, 2};
    fits_create_img(f, FLOAT_IMG, 2, naxes, &status);
    long first[2] = {1, 1};
    fits_write_pix(f, TFLOAT, first, 4, px.data(), &status);
    fits_close_file(f, &status);
    REQUIRE(status == 0);
    auto r = io::read_fits_image(p);
    REQUIRE(std::holds_alternative<io::FitsError>(r));
    CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("pixel (0, 1)"));
  }
  SECTION("writing a wrong-sized image") {
    std::vector<float> px(5);
    CHECK_THAT(io::write_fits_image(temp_path("bad.fits"), 2, 2, px), Catch::Contains("5 pixels"));
  }
}

TEST_CASE("undefined integer pixels (BLANK) are refused, and a wrong size before any pixel is read",
          "[fits][hardening]") {
  // FITS 4.0 sec. 4.4.2.5: in an integer image, pixels equal to BLANK are
  // undefined. A 16-bit dark with such holes used to be accepted.
  const fs::path p = temp_path("blank.fits");
  fs::remove(p);
  int status = 0;
  fitsfile* f = nullptr;
  fits_create_file(&f, p.string().c_str(), &status);
  long naxes[2] = {2, 2};
  fits_create_img(f, SHORT_IMG, 2, naxes, &status);
  long blank = -999;
  fits_update_key(f, TLONG, "BLANK", &blank, "undefined pixels", &status);
  short v[4] = {10, -999, 12, 13};
  long first[2] = {1, 1};
  fits_write_pix(f, TSHORT, first, 4, v, &status);
  fits_close_file(f, &status);
  REQUIRE(status == 0);
  auto r = io::read_fits_image(p);
  REQUIRE(std::holds_alternative<io::FitsError>(r));
  CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("pixel (1, 0)"));
  CHECK_THAT(std::get<io::FitsError>(r).message, Catch::Contains("undefined"));

  const fs::path q = temp_path("two_by_two.fits");
  REQUIRE(io::write_fits_image(q, 2, 2, std::vector<float>{1, 2, 3, 4}).empty());
  auto wrong = io::read_fits_image(q, io::FitsShape{240, 240, 1});
  REQUIRE(std::holds_alternative<io::FitsError>(wrong));
  CHECK_THAT(std::get<io::FitsError>(wrong).message, Catch::Contains("it is 2 x 2 x 1, expected 240 x 240 x 1"));
}
