// The maths behind the daemon's insight outputs: the modal (Zernike) fit,
// differential-motion r0, and the per-slope noise model, each checked
// through the simulator and the real pipeline against published figures
// (tests/REFERENCES.md R13).
#include <catch2/catch.hpp>

#include <cmath>
#include <cstring>
#include <numbers>

#include "client/sim/detector_model.h"
#include "client/sim/frame_bank.h"
#include "client/sim/spot_field.h"
#include "client/sim/turbulence_sim.h"
#include "daemon/core/centroid/centroid_noise.h"
#include "daemon/core/modal/modal_fit.h"
#include "daemon/core/modal/turbulence_statistics.h"
#include "daemon/core/pipeline/pipeline.h"

using namespace slopecast;
using std::numbers::pi;

namespace {

// f32 frames of expected photo-electrons (no noise, no rounding).
std::vector<std::byte> f32_bytes(const std::vector<double>& img) {
  std::vector<std::byte> out(img.size() * 4);
  for (std::size_t i = 0; i < img.size(); ++i) {
    const float v = static_cast<float>(img[i]);
    std::memcpy(out.data() + 4 * i, &v, 4);
  }
  return out;
}

core::PipelineSettings grid_settings(int n, int pitch, core::PixelFormat f) {
  core::PipelineSettings s;
  s.camera = {n * pitch, n * pitch, f};
  s.grid = {n, n, pitch, 0, 0};
  s.layout = core::regular_layout(s.grid);
  s.background = core::BackgroundMode::kNone;
  s.min_flux_adu = 1.0;
  s.min_snr = 0.0;
  return s;
}

}  // namespace

TEST_CASE("the modal fit returns the coefficients its own model made") {
  const core::LensletGrid g{16, 16, 15, 0, 0};
  const auto boxes = core::regular_layout(g);
  const core::PupilSpec pupil{120, 120, 240, 0.3};
  const auto used = core::valid_from_pupil(boxes, pupil, 0.5);
  auto made = core::ModalFit::make(boxes, used, pupil, 21);
  REQUIRE(std::holds_alternative<core::ModalFit>(made));
  const auto& fit = std::get<core::ModalFit>(made);
  std::vector<double> a(20), back(20);
  for (int k = 0; k < 20; ++k) a[k] = 10.0 * std::sin(1.3 * k + 0.4);
  std::vector<float> sx(256), sy(256);
  fit.slopes_of(a, 50.0, sx, sy);
  fit.fit(sx, sy, 50.0, back);
  for (int k = 0; k < 20; ++k) CHECK(back[k] == Approx(a[k]).margin(1e-4));  // float slopes: ~1e-6 relative
  // Too many modes for too few subapertures is a sentence.
  std::vector<std::uint8_t> few(256, 0);
  few[0] = few[1] = few[17] = 1;
  auto refused = core::ModalFit::make(boxes, few, pupil, 15);
  REQUIRE(std::holds_alternative<std::string>(refused));
  CHECK_THAT(std::get<std::string>(refused), Catch::Contains("fewer than the 14 modes"));
  // Noll tilt in every subaperture of an unobstructed pupil: Z2 = 2 rho cos t
  // has d/drho_x = 2, so a 1 nm coefficient is 2 w / R nm across a box
  // (w = 15 px, R = 120 px): 0.25 nm, 0.005 px at 50 nm per px.
  const core::PupilSpec open{120, 120, 240, 0.0};
  auto open_fit = std::get<core::ModalFit>(core::ModalFit::make(boxes, core::valid_from_pupil(boxes, open), open, 3));
  std::vector<double> tilt{1.0, 0.0};
  open_fit.slopes_of(tilt, 50.0, sx, sy);
  CHECK(sx[8 * 16 + 8] == Approx(2.0 * 15 / 120 / 50.0).epsilon(1e-6));  // float slopes
  CHECK(sy[8 * 16 + 8] == Approx(0.0).margin(1e-12));
}

TEST_CASE("known Zernike modes through the simulator and the pipeline come back within 2 %") {
  // 16 x 16 lenslets of 15 px over an obstructed pupil (30 %), static
  // aberrations only, noiseless: the check. lambda = 700 nm at 2 px
  // per lambda/d, so one px of spot shift is lambda / 2 = 350 nm of OPD
  // across a subaperture.
  sim::TurbulenceScene scene;
  scene.layers.clear();
  scene.pupil_diameter_m = 1.6;
  scene.obstruction = 0.3;
  scene.wavelength_nm = 700;
  scene.optics.pixels_per_lambda_over_d = 2.0;
  scene.photons_per_subaperture = 1e6;
  const std::vector<double> truth_nm{0, 150, -120, 110, 80, -90, 60, -55, 45, 50, 55, -40, 35, 30, -35};
  scene.zernike_nm = truth_nm;
  const core::LensletGrid grid{16, 16, 15, 0, 0};
  REQUIRE(sim::validate(scene, grid).empty());
  sim::TurbulenceSim simulator(scene, grid, 1);
  std::vector<double> img(240 * 240);
  sim::SubapertureTruth truth;
  simulator.render(0, img, 240, 240, truth);
  auto s = grid_settings(16, 15, core::PixelFormat::kF32);
  core::Pipeline p(s);
  auto m = p.make_measurement();
  auto bytes = f32_bytes(img);
  p.measure({bytes, 240, 240, 240 * 4, core::PixelFormat::kF32}, m);
  std::vector<std::uint8_t> used(256);
  for (int i = 0; i < 256; ++i) used[i] = truth.illuminated[i] >= 0.5 && (m.flags[i] == 0);
  const core::PupilSpec pupil{120, 120, 240, 0.3};
  auto made = core::ModalFit::make(s.layout, used, pupil, 15);
  REQUIRE(std::holds_alternative<core::ModalFit>(made));
  const auto& fit = std::get<core::ModalFit>(made);
  const double nm_per_px = 700.0 / 2.0;
  // (a) The simulator's truth, each subaperture's mean phase gradient:
  // the fit's model of a subaperture is the same mean gradient over its
  // lit part.
  std::vector<float> tx(truth.dx_px.begin(), truth.dx_px.end()), ty(truth.dy_px.begin(), truth.dy_px.end());
  std::vector<double> a(14);
  fit.fit(tx, ty, nm_per_px, a);
  for (int j = 2; j <= 15; ++j) {
    INFO("truth slopes, Z" << j << ": fitted " << a[j - 2] << " nm, made with " << truth_nm[j - 1] << " nm");
    CHECK(a[j - 2] == Approx(truth_nm[j - 1]).epsilon(0.02));
  }
  // (b) The pipeline's CoG slopes. A box of 7.5 lambda/d cuts the sinc^2
  // wings (about 1.4 % of the light beyond each side), which makes the CoG
  // read a few per cent short: the gain a bench calibrates when it sets its
  // slope units. Here it is measured as a bench would, on a known tilt
  // alone (Z2 = 150 nm), then applied.
  {
    sim::TurbulenceScene tilt = scene;
    tilt.zernike_nm = {0, 150};
    sim::TurbulenceSim tilted(tilt, grid, 1);
    std::vector<double> timg(240 * 240);
    sim::SubapertureTruth ttruth;
    tilted.render(0, timg, 240, 240, ttruth);
    auto tm = p.make_measurement();
    const auto tbytes = f32_bytes(timg);
    p.measure({tbytes, 240, 240, 240 * 4, core::PixelFormat::kF32}, tm);
    std::vector<double> ta(14);
    fit.fit(tm.slope_x_px, tm.slope_y_px, nm_per_px, ta);
    const double gain = ta[0] / 150.0;
    WARN("CoG gain on sinc^2 spots in 7.5 lambda/d boxes: " << gain);
    CHECK(gain > 0.9);
    CHECK(gain < 1.0);
    fit.fit(m.slope_x_px, m.slope_y_px, nm_per_px / gain, a);
  }
  for (int j = 2; j <= 15; ++j) {
    INFO("pipeline slopes, Z" << j << ": fitted " << a[j - 2] << " nm, made with " << truth_nm[j - 1] << " nm");
    CHECK(a[j - 2] == Approx(truth_nm[j - 1]).epsilon(0.02));
  }
  const double rms = core::wavefront_rms(a, 2);
  double made_rms = 0;
  for (int j = 2; j <= 15; ++j) made_rms += truth_nm[j - 1] * truth_nm[j - 1];
  CHECK(rms == Approx(std::sqrt(made_rms)).epsilon(0.02));
  // Strehl: exp(-(2 pi rms / lambda)^2); lambda / 14 rms gives 0.8176
  // (the Marechal criterion, Mahajan 1982).
  CHECK(core::strehl_estimate(1.0 / 14.0, 1.0) == Approx(0.8176).epsilon(1e-4));
}

TEST_CASE("differential-motion coefficients reproduce Tokovinin's and Noll's figures") {
  // Circular apertures, G-tilt (Tokovinin 2002, from memory; we reproduce
  // his fit formulas at b = 2 and 5 to 1 %):
  //   K_l = 0.340 (1 - 0.570 b^-1/3 - 0.040 b^-7/3), K_t = 0.340 (1 - 0.855 b^-1/3 + 0.030 b^-7/3).
  for (double b : {2.0, 5.0}) {
    const double kl = 0.340 * (1 - 0.570 * std::pow(b, -1.0 / 3) - 0.040 * std::pow(b, -7.0 / 3));
    const double kt = 0.340 * (1 - 0.855 * std::pow(b, -1.0 / 3) + 0.030 * std::pow(b, -7.0 / 3));
    CHECK(core::differential_tilt_coefficient(b, true, core::ApertureShape::kCircle) == Approx(kl).epsilon(0.01));
    CHECK(core::differential_tilt_coefficient(b, false, core::ApertureShape::kCircle) == Approx(kt).epsilon(0.01));
  }
  // Square subapertures (ours, derived): at wide separations the pair
  // decorrelates and both tend to twice the single-aperture G-tilt
  // variance; the longitudinal one is always the larger.
  for (int b = 1; b <= 4; ++b) {
    const double kl = core::differential_tilt_coefficient(b, true, core::ApertureShape::kSquare);
    const double kt = core::differential_tilt_coefficient(b, false, core::ApertureShape::kSquare);
    WARN("square subapertures, b = " << b << ": K_l " << kl << ", K_t " << kt);
    CHECK(kl > kt);
  }
  // Noll 1976: tilt 0.449 (D/r0)^(5/3) per coefficient, Z4 0.0232 (the
  // published residuals Delta_3 - Delta_4 = 0.134 - 0.111), 1 %.
  CHECK(core::zernike_variance_coefficient(2) == Approx(0.449).epsilon(0.01));
  CHECK(core::zernike_variance_coefficient(4) == Approx(0.0232).epsilon(0.01));
  // Seeing 0.98 lambda / r0: 0.1 m at 500 nm is 1.01 arcsec.
  CHECK(core::seeing_arcsec(500e-9, 0.1) == Approx(0.98 * 5e-6 * 206264.806247).epsilon(1e-9));  // arcsec per rad
  CHECK(core::r0_at(0.1, 500e-9, 1000e-9) == Approx(0.1 * std::pow(2.0, 1.2)).epsilon(1e-12));
}

TEST_CASE("r0 from differential motion on simulated turbulence, two r0 a factor 2 apart, within 15 %") {
  // 16 x 16 lenslets of 0.1 m (D = 1.6 m), 8 px boxes at 2 px per lambda/d,
  // sensing at 700 nm, two layers moving fast enough that frames 10 ms
  // apart are nearly independent; 400 frames each. Noiseless spots (the
  // noise term is tested on its own below). r0 given at 500 nm; the
  // estimate is made at 500 nm from OPD, never seeing the sensing
  // wavelength.
  for (double r0 : {0.10, 0.20}) {
    sim::TurbulenceScene scene;
    scene.r0_m = r0;
    scene.outer_scale_m = 20;
    scene.layers = {{0.6, 15, 10}, {0.4, 25, 100}};
    scene.pupil_diameter_m = 1.6;
    scene.wavelength_nm = 700;
    scene.optics.pixels_per_lambda_over_d = 2.0;
    scene.photons_per_subaperture = 1e6;
    scene.rate_hz = 100;
    const int frames = 400;
    scene.path_s = frames / scene.rate_hz;
    const core::LensletGrid grid{16, 16, 8, 0, 0};
    REQUIRE(sim::validate(scene, grid).empty());
    sim::TurbulenceSim simulator(scene, grid, 11);
    auto s = grid_settings(16, 8, core::PixelFormat::kF32);
    core::Pipeline p(s);
    auto m = p.make_measurement();
    std::vector<double> img(128 * 128);
    sim::SubapertureTruth truth;
    simulator.render(0, img, 128, 128, truth);
    std::vector<std::uint8_t> used(256);
    for (int i = 0; i < 256; ++i) used[i] = truth.illuminated[i] > 0.999;
    core::DifferentialMotion dimm(s.layout, used, 0.1, scene.outer_scale_m, frames);
    const double opd_per_px_m = 700e-9 / 2.0;
    std::vector<double> ox(256), oy(256);
    std::vector<std::uint8_t> valid(256);
    for (int k = 0; k < frames; ++k) {
      simulator.render(k, img, 128, 128, truth);
      const auto bytes = f32_bytes(img);
      p.measure({bytes, 128, 128, 128 * 4, core::PixelFormat::kF32}, m);
      for (int i = 0; i < 256; ++i) {
        ox[i] = m.slope_x_px[i] * opd_per_px_m;
        oy[i] = m.slope_y_px[i] * opd_per_px_m;
        valid[i] = m.flags[i] == 0;
      }
      dimm.add(ox, oy, valid);
    }
    const auto e = dimm.estimate(500e-9);
    INFO(e.refused);
    REQUIRE(e.ok);
    WARN("r0 " << r0 << " m: estimated " << e.r0_m << " m (longitudinal " << e.r0_longitudinal_m
               << ", transverse " << e.r0_transverse_m << ") from " << e.frames << " frames, " << e.pairs
               << " pairs");
    CHECK(e.r0_m == Approx(r0).epsilon(0.15));
    CHECK(e.frames == frames);
  }
  // Too few frames: refused with the reason.
  const core::LensletGrid g{4, 4, 8, 0, 0};
  core::DifferentialMotion few(core::regular_layout(g), std::vector<std::uint8_t>(16, 1), 0.1, 20, 100);
  const auto e = few.estimate(500e-9);
  CHECK_FALSE(e.ok);
  CHECK_THAT(e.refused, Catch::Contains("fewer than the 50"));
}

TEST_CASE("the noise model matches the slopes' own scatter on static noisy frames (CoG and weighted CoG)") {
  // 8 x 8 spots of rms 1.0 px in 10 px boxes, 1500 photo-electrons, read
  // noise 3 e-, bias 100 ADU removed by an exact dark, gain 1, 12-bit-like
  // rounding (1/12 ADU^2, added to the read noise). 600 frames each.
  core::LensletGrid grid{8, 8, 10, 0, 0};
  sim::SpotFieldSettings field;
  field.grid = grid;
  field.spot_sigma_px = 1.0;
  field.photons_per_spot = 1500;
  sim::SpotOffsets centred{std::vector<double>(64, 0.0), std::vector<double>(64, 0.0)};
  const auto expected = sim::render_spot_field(field, centred, 80, 80);
  sim::DetectorModel det;
  det.read_noise_e = 3.0;
  det.bias_adu = 100;
  const core::CameraSpec cam{80, 80, core::PixelFormat::kU16};
  const int frames = 600;
  const auto bank = sim::make_static_bank(expected, det, cam, frames, 9);
  for (auto kind : {core::CentroiderKind::kCog, core::CentroiderKind::kWeighted}) {
    auto s = grid_settings(8, 10, core::PixelFormat::kU16);
    s.dark_adu.assign(80 * 80, 100.0f);
    s.centroider.kind = kind;
    s.centroider.spot_sigma_px = 1.0;
    s.centroider.weight_sigma_px = 1.5;
    // The camera's noise for the pipeline's own model: 3 e- read noise plus
    // the rounding to whole ADU (1/12 ADU^2), gain 1.
    s.read_noise_e = std::sqrt(9.0 + 1.0 / 12.0);
    s.gain_e_per_adu = 1.0;
    core::Pipeline p(s);
    auto m = p.make_measurement();
    std::vector<double> sum(64), sum2(64), flux(64), published(64);
    for (const auto& f : bank.frames) {
      p.measure({f, 80, 80, 160, core::PixelFormat::kU16}, m);
      for (int i = 0; i < 64; ++i) {
        sum[i] += m.slope_x_px[i];
        sum2[i] += m.slope_x_px[i] * m.slope_x_px[i];
        flux[i] += m.flux_adu[i];
        published[i] += m.slope_var_x_px2[i];
      }
    }
    std::vector<double> ratio, published_ratio;
    for (int i = 0; i < 64; ++i) {
      const double empirical = (sum2[i] - sum[i] * sum[i] / frames) / (frames - 1);
      core::SpotNoiseInputs in;
      in.photons_e = flux[i] / frames;
      in.read_noise_e = std::sqrt(9.0 + 1.0 / 12.0);
      in.spot_sigma_px = 1.0;
      in.box_px = 10;
      ratio.push_back(empirical / core::centroid_noise_variance(s.centroider, in));
      // What the pipeline publishes beside each slope (its widths measured
      // from the noisy spot itself, frame by frame).
      published_ratio.push_back(empirical / (published[i] / frames));
    }
    std::nth_element(published_ratio.begin(), published_ratio.begin() + 32, published_ratio.end());
    WARN(core::centroider_name(kind) << ": empirical / published model variance, median: " << published_ratio[32]);
    CHECK(published_ratio[32] == Approx(1.0).epsilon(0.15));
    std::nth_element(ratio.begin(), ratio.begin() + 32, ratio.end());
    WARN(core::centroider_name(kind) << ": empirical / model slope variance, median over 64 subapertures: "
                                     << ratio[32]);
    // 600 frames: a variance is known to ~6 % each; the median of 64 to ~1 %.
    CHECK(ratio[32] == Approx(1.0).epsilon(0.15));
  }
}
