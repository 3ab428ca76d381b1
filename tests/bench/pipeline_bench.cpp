// How close the per-frame computation runs to the memory floor, for every
// centroider.
//
// For each sensor size the benchmark times two floors -- memcpy of the
// frame's bytes, and a plain vectorised sum over its pixels, the least work
// that reads every pixel once -- then Pipeline::measure (dark subtraction,
// border background, moments, the centroider, flags and slopes) with each
// method at its default settings, and, for the CoG, measure plus building
// and serialising the measurement protobuf as the daemon does per frame. It
// prints each as a ratio to both floors from the same run: ratios, not
// absolute times, are what compare across shared machines.
//
// Run: build/tests/bench/pipeline_bench --benchmark_repetitions=5
//          --benchmark_report_aggregates_only=true   (ratios of medians)
#include <benchmark/benchmark.h>
#include <fmt/format.h>

#include <cstring>
#include <iostream>
#include <map>
#include <random>
#include <set>

#include "client/sim/detector_model.h"
#include "client/sim/spot_field.h"
#include "daemon/core/pipeline/pipeline.h"
#include "daemon/io/wire_codec.h"

using namespace slopecast;

namespace {

struct Sensor {
  const char* name;
  int n, pitch;
};
constexpr Sensor kSensors[] = {{"16x16x15px", 16, 15}, {"40x40x10px", 40, 10}, {"80x80x10px", 80, 10}};

struct Fixture {
  core::PipelineSettings settings;
  std::vector<std::uint16_t> frame;
  core::ImageView view() const {
    return {std::as_bytes(std::span(frame)), settings.camera.width_px, settings.camera.height_px,
            static_cast<std::size_t>(settings.camera.width_px) * 2, core::PixelFormat::kU16};
  }
};

Fixture make_fixture(const Sensor& s) {
  Fixture f;
  const int side = s.n * s.pitch;
  f.settings.camera = {side, side, core::PixelFormat::kU16};
  f.settings.grid = {s.n, s.n, s.pitch, 0, 0};
  f.settings.dark_adu.assign(static_cast<std::size_t>(side) * side, 100.0f);
  f.settings.min_flux_adu = 100;
  sim::SpotFieldSettings field;
  field.grid = f.settings.grid;
  std::mt19937_64 rng(1);
  const auto expected = sim::render_spot_field(field, sim::draw_offsets(field, rng), side, side);
  f.frame.resize(expected.size());
  sim::expose(expected, sim::DetectorModel{}, rng, f.frame);
  return f;
}

void BM_memcpy(benchmark::State& state, Sensor s) {
  const Fixture f = make_fixture(s);
  std::vector<std::uint16_t> dst(f.frame.size());
  for (auto _ : state) {
    std::memcpy(dst.data(), f.frame.data(), f.frame.size() * 2);
    benchmark::DoNotOptimize(dst.data());
    benchmark::ClobberMemory();
  }
  state.SetBytesProcessed(state.iterations() * f.frame.size() * 2);
}

// The floor for pixel work: sum every pixel of the frame (the compiler
// vectorises this loop).
void BM_sum(benchmark::State& state, Sensor s) {
  const Fixture f = make_fixture(s);
  for (auto _ : state) {
    std::uint64_t total = 0;
    for (std::uint16_t v : f.frame) total += v;
    benchmark::DoNotOptimize(total);
  }
  state.SetBytesProcessed(state.iterations() * f.frame.size() * 2);
}

void BM_measure(benchmark::State& state, Sensor s, core::CentroiderKind kind, bool border) {
  Fixture f = make_fixture(s);
  f.settings.centroider.kind = kind;
  if (!border) f.settings.background = core::BackgroundMode::kNone;
  f.settings.centroider.spot_sigma_px = 1.0;  // the simulator's default spot
  f.settings.centroider.brightest_pixels = std::min(20, s.pitch * s.pitch - 1);
  core::Pipeline p(f.settings);
  auto m = p.make_measurement();
  for (auto _ : state) {
    p.measure(f.view(), m);
    benchmark::DoNotOptimize(m.slope_x_px.data());
  }
  state.SetBytesProcessed(state.iterations() * f.frame.size() * 2);
}

void BM_measure_encode(benchmark::State& state, Sensor s) {
  const Fixture f = make_fixture(s);
  core::Pipeline p(f.settings);
  auto m = p.make_measurement();
  v1::Measurement msg;
  std::vector<std::uint8_t> out(1 << 20);
  io::MeasurementStamp stamp;
  stamp.n_subap_x = stamp.n_subap_y = s.n;
  for (auto _ : state) {
    p.measure(f.view(), m);
    io::encode_measurement(m, stamp, msg);
    const std::size_t n = msg.ByteSizeLong();
    msg.SerializeWithCachedSizesToArray(out.data());
    benchmark::DoNotOptimize(n);
  }
  state.SetBytesProcessed(state.iterations() * f.frame.size() * 2);
}

// Collects each benchmark's time per iteration (the median when
// --benchmark_repetitions asks for several runs) so main can print ratios.
class RatioReporter : public benchmark::ConsoleReporter {
 public:
  std::map<std::string, double> ns;
  void ReportRuns(const std::vector<Run>& runs) override {
    for (const auto& r : runs) {
      const std::string name = r.run_name.str();
      if (r.run_type == Run::RT_Aggregate && r.aggregate_name == "median") {
        ns[name] = r.GetAdjustedRealTime();
        medians_.insert(name);
      } else if (r.run_type == Run::RT_Iteration && !medians_.count(name)) {
        ns[name] = r.GetAdjustedRealTime();
      }
    }
    ConsoleReporter::ReportRuns(runs);
  }

 private:
  std::set<std::string> medians_;
};

}  // namespace

int main(int argc, char** argv) {
  for (const Sensor& s : kSensors) {
    benchmark::RegisterBenchmark((std::string("memcpy/") + s.name).c_str(), BM_memcpy, s);
    benchmark::RegisterBenchmark((std::string("sum/") + s.name).c_str(), BM_sum, s);
    for (core::CentroiderKind k : core::kAllCentroiderKinds)
      benchmark::RegisterBenchmark(fmt::format("measure/{}/{}", core::centroider_name(k), s.name).c_str(),
                                   BM_measure, s, k, true);
    benchmark::RegisterBenchmark(fmt::format("measure/cog-nobg/{}", s.name).c_str(), BM_measure, s,
                                 core::CentroiderKind::kCog, false);
    benchmark::RegisterBenchmark((std::string("measure+encode/cog/") + s.name).c_str(), BM_measure_encode, s);
  }
  benchmark::Initialize(&argc, argv);
  RatioReporter reporter;
  benchmark::RunSpecifiedBenchmarks(&reporter);
  // One table: per method and sensor, time per frame as a ratio to memcpy
  // and to the plain sum of the same frame (1.0 = the floor).
  std::cout << "\nper-frame time as a ratio to memcpy / to a plain sum of the same u16 frame:\n";
  std::cout << fmt::format("  {:<20}", "method");
  for (const Sensor& s : kSensors) std::cout << fmt::format(" {:>22}", s.name);
  std::cout << "\n";
  auto row = [&](const std::string& label, const std::string& prefix) {
    std::cout << fmt::format("  {:<20}", label);
    for (const Sensor& s : kSensors) {
      const double copy = reporter.ns[std::string("memcpy/") + s.name], sum = reporter.ns[std::string("sum/") + s.name];
      const double t = reporter.ns[prefix + s.name];
      std::cout << (copy > 0 && sum > 0 && t > 0 ? fmt::format(" {:>10.1f}x / {:>7.1f}x", t / copy, t / sum)
                                                 : fmt::format(" {:>22}", "-"));
    }
    std::cout << "\n";
  };
  row("sum (floor)", "sum/");
  for (core::CentroiderKind k : core::kAllCentroiderKinds)
    row(std::string(core::centroider_name(k)), fmt::format("measure/{}/", core::centroider_name(k)));
  row("cog, no background", "measure/cog-nobg/");
  row("cog + encode", "measure+encode/cog/");
  benchmark::Shutdown();
  return 0;
}
