// The evaluation bench's arithmetic (client/eval): every figure is checked
// on measurements built by hand, where the answer is known exactly
// (derived), and the candidate sweeps against the option checker they share
// with the daemon.
#include <catch2/catch.hpp>

#include <cmath>
#include <random>

#include "client/eval/candidates.h"
#include "client/eval/scorecard.h"

using namespace slopecast;

namespace {

core::FrameMeasurement frame(int n) {
  core::FrameMeasurement m;
  m.resize(n);
  for (int i = 0; i < n; ++i) m.flux_adu[i] = 1000.0f;
  return m;
}

}  // namespace

TEST_CASE("scorecard: bias, rms, gain and offset of a known linear response", "[eval]") {
  // measured = 0.9 t + 0.05 exactly (derived): the line comes back to float
  // precision, the bias is the mean error and the rms its root mean square.
  const int n = 4;
  eval::ScoringSettings s;
  s.gain_within_px = 2.0;
  eval::Scorecard card(n, s);
  std::vector<float> dx(n), dy(n);
  double sum_e = 0, sum_e2 = 0;
  int count = 0;
  for (int k = 0; k < 50; ++k) {
    auto m = frame(n);
    for (int i = 0; i < n; ++i) {
      const float t = static_cast<float>(-1.5 + 3.0 * ((k * n + i) % 37) / 36.0);
      dx[i] = t;
      dy[i] = -t;
      m.slope_x_px[i] = 0.9f * t + 0.05f;
      m.slope_y_px[i] = -t;
      const double e = static_cast<double>(m.slope_x_px[i]) - t;
      sum_e += e;
      sum_e2 += e * e;
      ++count;
    }
    const eval::TruthView truth{dx, dy, {}};
    card.add(m, &truth, nullptr, 1e-4);
  }
  const auto r = card.summary();
  CHECK(r.has_truth);
  CHECK(r.samples == 200);
  CHECK(r.x.gain == Approx(0.9).margin(1e-6));
  CHECK(r.x.offset_px == Approx(0.05).margin(1e-6));
  CHECK(r.y.gain == Approx(1.0).margin(1e-9));
  CHECK(r.x.bias_px == Approx(sum_e / count).margin(1e-9));
  CHECK(r.x.rms_px == Approx(std::sqrt(sum_e2 / count)).margin(1e-9));
  CHECK(r.y.rms_px == Approx(0.0).margin(1e-9));
  CHECK(r.rms_px == Approx(std::sqrt(0.5 * sum_e2 / count)).margin(1e-9));
  CHECK(r.valid_fraction == 1.0);
  CHECK(r.median_us == Approx(100.0).margin(1e-3));
  // An exact line is linear over all of its range: out to the bin [1.4,
  // 1.5); the last bin, [1.5, 1.6), holds 5 samples and is passed over.
  CHECK(r.x.linear_range_px == Approx(1.5).margin(1e-9));
}

TEST_CASE("scorecard: the linear range ends where the response bends", "[eval]") {
  // measured = t for |t| <= 0.5, then flat at +-0.5 (a saturating
  // response): with 0.1 px bins and a 0.04 px tolerance the range ends at
  // the first bin whose mean departs from the fitted line by more.
  eval::ScoringSettings s;
  s.gain_within_px = 0.5;
  s.linear_tolerance_px = 0.04;
  eval::Scorecard card(1, s);
  std::vector<float> dx(1), dy(1);
  for (int k = 0; k <= 300; ++k) {
    const float t = static_cast<float>(-1.5 + 0.01 * k);
    auto m = frame(1);
    m.slope_x_px[0] = std::clamp(t, -0.5f, 0.5f);
    m.slope_y_px[0] = t;
    dx[0] = dy[0] = t;
    const eval::TruthView truth{dx, dy, {}};
    card.add(m, &truth, nullptr, 0);
  }
  const auto r = card.summary();
  CHECK(r.x.gain == Approx(1.0).margin(1e-4));
  // Derived from the clamp: bin [0.4, 0.5) does not depart, bin [0.5, 0.6)
  // departs by the mean of 0.01 j, j = 0..9: 0.045 px (beyond 0.04): the
  // range is 0.5 px. The identity response is linear out to 1.5 px (the
  // bin [1.5, 1.6) holds one sample, too few to count).
  CHECK(r.x.linear_range_px == Approx(0.5).margin(1e-9));
  CHECK(r.y.linear_range_px == Approx(1.5).margin(1e-9));
  // The response curve has one point per bin (-15..15), the measured means clamped.
  REQUIRE(r.response_x.size() == 31);
  CHECK(r.response_x.front().measured_px == Approx(-0.5).margin(1e-6));
}

TEST_CASE("scorecard: false accepts and rejects follow the truth's lit fraction", "[eval]") {
  // Subaperture 0 is lit and valid, 1 lit but flagged (a false reject), 2
  // half-dark but valid (a false accept at usable_fraction 0.5), 3 dark and
  // flagged (right).
  eval::Scorecard card(4, {});
  std::vector<float> dx(4, 0.0f), dy(4, 0.0f), lit{1.0f, 1.0f, 0.3f, 0.0f};
  auto m = frame(4);
  m.flags[1] = core::kFlagLowSnr;
  m.flags[3] = core::kFlagLowFlux | core::kFlagLowSnr;
  const eval::TruthView truth{dx, dy, lit};
  for (int k = 0; k < 10; ++k) card.add(m, &truth, nullptr, 0);
  const auto r = card.summary();
  CHECK(r.usable == 20);
  CHECK(r.unusable == 20);
  CHECK(r.false_reject_fraction == Approx(0.5));
  CHECK(r.false_accept_fraction == Approx(0.5));
  CHECK(r.valid_fraction == Approx(0.5));
  CHECK(r.samples == 10);  // only subaperture 0 is scored
  CHECK(r.invalid_reasons.at(core::kFlagLowSnr) == 20);
  CHECK(r.invalid_reasons.at(core::kFlagLowFlux) == 10);
  CHECK(std::isfinite(r.rms_by_subaperture_px[0]));
  CHECK(std::isnan(r.rms_by_subaperture_px[1]));
}

TEST_CASE("scorecard: temporal noise and agreement without truth", "[eval]") {
  // Slopes drawn with a known spread (0.1 px in x, 0.2 in y): the pooled
  // temporal noise sqrt((0.01 + 0.04) / 2) = 0.158 px within its sampling
  // error (4000 frames: 1.1 %, so 4 %); a second candidate that reads the
  // same slopes plus 0.03 px agrees to 0.03 px exactly.
  const int n = 3;
  eval::Scorecard first(n, {}), second(n, {});
  std::mt19937_64 rng(5);
  std::normal_distribution<double> gx(0.0, 0.1), gy(0.0, 0.2);
  for (int k = 0; k < 4000; ++k) {
    auto a = frame(n), b = frame(n);
    for (int i = 0; i < n; ++i) {
      a.slope_x_px[i] = static_cast<float>(gx(rng));
      a.slope_y_px[i] = static_cast<float>(gy(rng));
      b.slope_x_px[i] = a.slope_x_px[i] + 0.03f;
      b.slope_y_px[i] = a.slope_y_px[i] + 0.03f;
    }
    first.add(a, nullptr, nullptr, 0);
    second.add(b, nullptr, &a, 0);
  }
  const auto r1 = first.summary(), r2 = second.summary();
  CHECK_FALSE(r1.has_truth);
  CHECK(std::isnan(r1.rms_px));
  CHECK(r1.median_noise_px == Approx(std::sqrt(0.025)).epsilon(0.04));
  CHECK(r2.median_noise_px == Approx(r1.median_noise_px).epsilon(1e-5));
  CHECK(std::isnan(r1.agreement_rms_px));
  CHECK(r2.agreement_rms_px == Approx(0.03).epsilon(1e-4));
}

TEST_CASE("candidates: sweeps expand to every combination, checked like the daemon's options", "[eval]") {
  core::CentroiderSettings base;
  auto made = eval::parse_candidate_text("correlation correlation_metric=sdf,adf2 peak_interpolation=parabola,gaussian", base);
  REQUIRE(std::holds_alternative<std::vector<eval::Candidate>>(made));
  const auto& c = std::get<std::vector<eval::Candidate>>(made);
  REQUIRE(c.size() == 4);
  CHECK(c[0].label == "correlation correlation_metric=sdf peak_interpolation=parabola");
  CHECK(c[1].label == "correlation correlation_metric=sdf peak_interpolation=gaussian");
  CHECK(c[3].settings.metric == core::CorrelationMetric::kAdfSquared);
  CHECK(c[3].settings.interpolation == core::PeakInterpolation::kGaussian);
  CHECK(c[3].settings.kind == core::CentroiderKind::kCorrelation);

  auto bad = eval::parse_candidate_text("wcog weight_sigma=2", base);
  REQUIRE(std::holds_alternative<std::string>(bad));
  CHECK_THAT(std::get<std::string>(bad), Catch::Contains("unknown centroider option 'weight_sigma'"));
  auto negative = eval::parse_candidate_text("wcog weight_sigma_px=2,-1", base);
  REQUIRE(std::holds_alternative<std::string>(negative));
  CHECK_THAT(std::get<std::string>(negative), Catch::Contains("weight_sigma_px"));

  // Options not given keep the base's values (the config's centroider).
  base.spot_sigma_px = 0.8;
  auto kept = eval::parse_candidate_text("tcog threshold=0.1,0.3", base);
  REQUIRE(std::holds_alternative<std::vector<eval::Candidate>>(kept));
  CHECK(std::get<std::vector<eval::Candidate>>(kept)[1].settings.spot_sigma_px == 0.8);
  CHECK(std::get<std::vector<eval::Candidate>>(kept)[1].settings.threshold == 0.3);
  CHECK(eval::check_labels(std::get<std::vector<eval::Candidate>>(kept)).empty());
  auto twice = std::get<std::vector<eval::Candidate>>(kept);
  twice.push_back(twice[0]);
  CHECK_THAT(eval::check_labels(twice), Catch::Contains("tcog threshold=0.1"));
}
