// Recording and replay against the real daemon, over real ZeroMQ sockets:
//  - the physical simulator -> daemon -> recorder (frames and measurements);
//    replaying that recording through a fresh daemon gives identical
//    measurements, bit for bit (flow-controlled, so nothing can drop);
//  - export to a FITS cube read back by astropy with identical pixels;
//  - FITS cubes written by astropy (BITPIX 8, 16 + BZERO, 32, -32) replay
//    with the pixels astropy wrote;
//  - a recorder killed with SIGKILL mid-run leaves a file that reads up to
//    its last whole record.
#include <catch2/catch.hpp>

#include <csignal>
#include <cstring>
#include <fstream>
#include <functional>
#include <map>
#include <thread>

#include "daemon/io/recording.h"
#include "daemon/io/fits_image.h"
#include "slopecast/v1/frame.pb.h"
#include "slopecast/v1/measurement.pb.h"
#include "tests/integration/daemon_harness.h"

using namespace slopecast;
using namespace std::chrono_literals;

namespace {

const std::string kConfig =
    "[camera]\nwidth_px = 96\nheight_px = 96\npixel_type = \"u16\"\n"
    "[lenslet_grid]\nsubapertures_x = 8\nsubapertures_y = 8\npitch_px = 12\n"
    "[daemon]\nframe_queue_depth = 1000\nmeasurement_queue_depth = 1000\n";
const std::vector<std::string> kGrid = {"--subapertures-x", "8", "--subapertures-y", "8", "--pitch-px", "12"};

// An invented scenario: a 1 m telescope with a 20 % obstruction, two layers.
const std::string kScenario = R"(
[atmosphere]
r0_m = 0.15
outer_scale_m = 20
[[layer]]
fraction = 0.7
wind_m_per_s = 6
[[layer]]
fraction = 0.3
wind_m_per_s = 15
wind_direction_deg = 70
[pupil]
diameter_m = 1.0
obstruction = 0.2
[optics]
wavelength_nm = 700
pixels_per_lambda_over_d = 2.0
[light]
photons_per_subaperture = 20000
[detector]
read_noise_e = 2
bias_adu = 100
bit_depth = 16
)";

struct Contents {
  std::vector<io::RecordedMessage> frames, measurements, truths;
  int damaged = 0, torn = 0;
};

Contents read_recording(const std::filesystem::path& path) {
  auto opened = io::RecordingReader::open(path);
  INFO(path);
  REQUIRE(std::holds_alternative<std::unique_ptr<io::RecordingReader>>(opened));
  auto& r = *std::get<std::unique_ptr<io::RecordingReader>>(opened);
  Contents c;
  io::RecordedMessage m;
  for (io::ReadOutcome o; (o = r.next(m)) != io::ReadOutcome::kEnd;) {
    if (o == io::ReadOutcome::kTornTail) ++c.torn;
    if (o == io::ReadOutcome::kCorrupt) ++c.damaged;
    if (o != io::ReadOutcome::kRecord) continue;
    (m.kind == io::RecordKind::kFrame ? c.frames
     : m.kind == io::RecordKind::kTruth ? c.truths
                                             : c.measurements)
        .push_back(m);
  }
  return c;
}

template <typename T>
bool same_bits(const google::protobuf::RepeatedField<T>& a, const google::protobuf::RepeatedField<T>& b) {
  return a.size() == b.size() && std::memcmp(a.data(), b.data(), sizeof(T) * a.size()) == 0;
}

std::string run_python(const std::string& args, const std::filesystem::path& log) {
  const std::string script = std::string(SLOPECAST_SOURCE_DIR) + "/tests/integration/astropy_cube_check.py";
  const int rc = std::system(("/usr/bin/python3 " + script + " " + args + " > " + log.string() + " 2>&1").c_str());
  const std::string text = testing::read_log(log);
  INFO("astropy said: " << text << "\n(this test needs Debian's python3-astropy; `bash .ci/quickstart.sh test` "
                                   "installs it)");
  REQUIRE(rc == 0);
  return text;
}

}  // namespace

TEST_CASE("simulated turbulence, recorded, replays through a fresh daemon to identical measurements",
          "[integration][recording]") {
  testing::DaemonHarness h;
  REQUIRE(h.start(kConfig));
  {
    std::ofstream(h.dir / "scenario.toml") << kScenario;
  }
  const auto a = h.dir / "a.screc";
  const int frames = 40;
  std::string truth_endpoint = "ipc://";
  truth_endpoint += (h.dir / "truth").string();
  testing::ChildProcess rec(SLOPECAST_PATH,
                            {"record", "--frames-from", h.frames_endpoint, "--measurements-from",
                             h.measurements_endpoint, "--truth-from", truth_endpoint, "--out", a.string(), "--frames",
                             std::to_string(frames)},
                            h.dir / "record.log");
  REQUIRE(h.wait_for_subscribers(1));  // the recorder's measurement subscription
  std::vector<std::string> args = {"sim", "--scenario", (h.dir / "scenario.toml").string(), "--frames-out",
                                   h.frames_endpoint, "--frames", std::to_string(frames), "--distinct-frames",
                                   std::to_string(frames), "--rate-hz", "200", "--block-when-full", "--subscribers",
                                   "2", "--truth-csv", (h.dir / "truth.csv").string(), "--truth-out", truth_endpoint,
                                   "--seed", "3"};
  args.insert(args.end(), kGrid.begin(), kGrid.end());
  testing::ChildProcess sim(SLOPECAST_PATH, args, h.dir / "sim.log");
  INFO("sim log:\n" << testing::read_log(h.dir / "sim.log") << "\nrecord log:\n"
                    << testing::read_log(h.dir / "record.log") << "\ndaemon log:\n" << h.log());
  REQUIRE(sim.wait(120s) == 0);
  REQUIRE(rec.wait(30s) == 0);

  const auto first = read_recording(a);
  REQUIRE(first.frames.size() == frames);
  REQUIRE(first.measurements.size() == frames);
  REQUIRE(first.truths.size() == frames);
  CHECK(first.damaged == 0);
  CHECK(first.torn == 0);

  // The daemon measured the simulated turbulence: its slopes follow the
  // truth (each subaperture's mean phase gradient) on fully lit
  // subapertures. Photon noise at 2e4 photons is ~0.01 px; the box cuts
  // the sinc^2 wings and the border background takes a little light: 0.15 px
  // rms (the same bound as the simulator's own unit test).
  {
    std::ifstream in(h.dir / "truth.csv");
    std::string line;
    std::getline(in, line);
    REQUIRE(line == "frame_seq,subaperture,true_dx_px,true_dy_px,illuminated");
    std::map<std::pair<int, int>, std::array<double, 3>> truth;
    while (std::getline(in, line)) {
      int seq = 0, s = 0;
      double dx = 0, dy = 0, lit = 0;
      REQUIRE(std::sscanf(line.c_str(), "%d,%d,%lf,%lf,%lf", &seq, &s, &dx, &dy, &lit) == 5);
      truth[{seq, s}] = {dx, dy, lit};
    }
    double sum2 = 0, spread = 0;
    int n = 0;
    for (const auto& rm : first.measurements) {
      v1::Measurement m;
      REQUIRE(m.ParseFromString(rm.parts[0]));
      for (int s = 0; s < m.slope_x_size(); ++s) {
        const auto& t = truth.at({static_cast<int>(m.frame_seq()), s});
        if (t[2] < 0.999 || !m.valid(s)) continue;
        sum2 += std::pow(m.slope_x(s) - t[0], 2) + std::pow(m.slope_y(s) - t[1], 2);
        spread += t[0] * t[0] + t[1] * t[1];
        n += 2;
      }
    }
    REQUIRE(n > 20 * frames);
    WARN("daemon vs simulator truth: " << std::sqrt(sum2 / n) << " px rms over " << n << " slopes; truth rms "
                                       << std::sqrt(spread / n) << " px");
    CHECK(std::sqrt(sum2 / n) < 0.15);
    CHECK(std::sqrt(spread / n) > 0.3);  // the turbulence really moves the spots
  }

  // Replay through a fresh daemon with the same settings, flow-controlled.
  testing::DaemonHarness h2;
  REQUIRE(h2.start(kConfig));
  const auto b = h2.dir / "b.screc";
  testing::ChildProcess replay(SLOPECAST_PATH,
                               {"replay", a.string(), "--frames-out", h2.frames_endpoint, "--measurements-from",
                                h2.measurements_endpoint, "--control", h2.control_endpoint, "--flow", "--flow-window", "4",
                                "--save-measurements", b.string()},
                               h2.dir / "replay.log");
  INFO("replay log:\n" << testing::read_log(h2.dir / "replay.log") << "\nsecond daemon log:\n" << h2.log());
  REQUIRE(replay.wait(60s) == 0);
  const auto second = read_recording(b);
  REQUIRE(second.measurements.size() == frames);
  for (int k = 0; k < frames; ++k) {
    v1::Measurement m1, m2;
    REQUIRE(m1.ParseFromString(first.measurements[k].parts[0]));
    REQUIRE(m2.ParseFromString(second.measurements[k].parts[0]));
    REQUIRE(m1.frame_seq() == m2.frame_seq());
    CHECK(m1.camera_time_ns() == m2.camera_time_ns());
    CHECK(same_bits(m1.slope_x(), m2.slope_x()));
    CHECK(same_bits(m1.slope_y(), m2.slope_y()));
    CHECK(same_bits(m1.flux_adu(), m2.flux_adu()));
    CHECK(same_bits(m1.peak_adu(), m2.peak_adu()));
    CHECK(same_bits(m1.flags(), m2.flags()));
    CHECK(same_bits(m1.valid(), m2.valid()));
    CHECK(same_bits(m1.background_adu(), m2.background_adu()));
  }

  // Export: astropy reads the cube with the pixels the camera sent.
  const auto cube = h.dir / "frames.fits";
  testing::ChildProcess ex(SLOPECAST_PATH,
                           {"export", a.string(), "--fits-cube", cube.string(), "--measurements-csv",
                            (h.dir / "m.csv").string(), "--measurements-fits", (h.dir / "m.fits").string(),
                            "--truth-csv", (h.dir / "truth_exported.csv").string()},
                           h.dir / "export.log");
  INFO("export log:\n" << testing::read_log(h.dir / "export.log"));
  REQUIRE(ex.wait(30s) == 0);
  const std::string said = run_python("read " + cube.string() + " " + (h.dir / "pixels.raw").string(),
                                      h.dir / "astropy.log");
  CHECK_THAT(said, Catch::Contains("BITPIX 16 BZERO 32768"));
  CHECK_THAT(said, Catch::Contains("shape (40, 96, 96)"));
  std::string seqs = "FRAME_SEQ";
  for (int k = 0; k < frames; ++k) {
    seqs += ' ';
    seqs += std::to_string(k);
  }
  CHECK_THAT(said, Catch::Contains(seqs));
  std::string expected;
  for (const auto& f : first.frames) expected += f.parts[1];
  CHECK(testing::read_log(h.dir / "pixels.raw") == expected);
  std::ifstream csv(h.dir / "m.csv");
  int rows = 0;
  for (std::string line; std::getline(csv, line);) ++rows;
  CHECK(rows == 1 + frames * 64);
  // The measurements table holds the same numbers as the CSV and the
  // recording (cfitsio reads it back).
  auto table = io::read_fits_table(h.dir / "m.fits", "MEASUREMENTS");
  REQUIRE(std::holds_alternative<io::FitsTable>(table));
  const auto& t = std::get<io::FitsTable>(table);
  REQUIRE(t.rows == frames * 64);
  v1::Measurement m5;
  REQUIRE(m5.ParseFromString(first.measurements[5].parts[0]));
  for (int s = 0; s < 64; ++s) {
    CHECK(t.find("SLOPE_X")->values[5 * 64 + s] == m5.slope_x(s));
    CHECK(t.find("FRAME_SEQ")->values[5 * 64 + s] == 5);
  }
  // The truth kept in the recording is the truth the simulator wrote
  // (float on the wire: 1e-6 px).
  std::ifstream t1(h.dir / "truth.csv"), t2(h.dir / "truth_exported.csv");
  std::string l1, l2;
  int lines = 0;
  while (std::getline(t1, l1) && std::getline(t2, l2)) {
    if (lines++ == 0) {
      CHECK(l1 == l2);
      continue;
    }
    double a1[5], a2[5];
    REQUIRE(std::sscanf(l1.c_str(), "%lf,%lf,%lf,%lf,%lf", &a1[0], &a1[1], &a1[2], &a1[3], &a1[4]) == 5);
    REQUIRE(std::sscanf(l2.c_str(), "%lf,%lf,%lf,%lf,%lf", &a2[0], &a2[1], &a2[2], &a2[3], &a2[4]) == 5);
    for (int i = 0; i < 5; ++i) REQUIRE(a1[i] == Approx(a2[i]).margin(1e-6));
  }
  CHECK(lines == 1 + frames * 64);
}

TEST_CASE("FITS cubes written by astropy replay with astropy's pixels, and slopecast's cubes read in astropy, for "
          "BITPIX 8, 16, 32 and -32",
          "[integration][recording]") {
  testing::TempDir dir;
  run_python("write " + dir.path().string(), dir / "astropy_write.log");
  struct Case {
    const char* name;
    v1::PixelType type;
    std::function<double(int)> value;  // of p = (x + 7y + 13z) % 251
    const char* astropy_says;          // how astropy sees slopecast's export of the replayed frames
  };
  const Case cases[] = {
      {"cube_8", v1::PIXEL_TYPE_U8, [](int p) { return p; }, "BITPIX 8 BZERO 0 shape (5, 12, 20) dtype uint8"},
      {"cube_16", v1::PIXEL_TYPE_U16, [](int p) { return 40000 + 97 * p; },
       "BITPIX 16 BZERO 32768 shape (5, 12, 20) dtype uint16"},
      {"cube_32", v1::PIXEL_TYPE_U32, [](int p) { return 100000.0 * p + 12345; },
       "BITPIX 32 BZERO 2147483648 shape (5, 12, 20) dtype uint32"},
      {"cube_m32", v1::PIXEL_TYPE_F32, [](int p) { return p + 0.25; },
       "BITPIX -32 BZERO 0 shape (5, 12, 20) dtype >f4"}};  // big-endian float, as stored
  for (const auto& c : cases) {
    INFO(c.name);
    std::string endpoint = "ipc://";  // built by append: GCC 12 warns falsely (-Wrestrict) on "literal" + string
    endpoint += (dir / (std::string(c.name) + ".ipc")).string();
    const auto out = dir / (std::string(c.name) + ".screc");
    testing::ChildProcess rec(SLOPECAST_PATH, {"record", "--frames-from", endpoint, "--out", out.string(), "--frames", "5"},
                              dir / "rec.log");
    testing::ChildProcess replay(SLOPECAST_PATH,
                                 {"replay", (dir / (std::string(c.name) + ".fits")).string(), "--frames-out", endpoint,
                                  "--rate-hz", "100"},
                                 dir / "replay.log");
    INFO("replay log:\n" << testing::read_log(dir / "replay.log") << "\nrecord log:\n" << testing::read_log(dir / "rec.log"));
    REQUIRE(replay.wait(30s) == 0);
    REQUIRE(rec.wait(30s) == 0);
    const auto got = read_recording(out);
    REQUIRE(got.frames.size() == 5);
    for (int z = 0; z < 5; ++z) {
      v1::FrameHeader fh;
      REQUIRE(fh.ParseFromString(got.frames[z].parts[0]));
      CHECK(fh.seq() == static_cast<std::uint64_t>(z));
      CHECK(fh.pixel_type() == c.type);
      REQUIRE(fh.width_px() == 20);
      REQUIRE(fh.height_px() == 12);
      const std::string& px = got.frames[z].parts[1];
      int wrong = 0;
      for (int y = 0; y < 12; ++y)
        for (int x = 0; x < 20; ++x) {
          const int i = y * 20 + x;
          const double want = c.value((x + 7 * y + 13 * z) % 251);
          double have = 0;
          if (c.type == v1::PIXEL_TYPE_U8) have = static_cast<unsigned char>(px[i]);
          if (c.type == v1::PIXEL_TYPE_U16) { std::uint16_t v; std::memcpy(&v, px.data() + 2 * i, 2); have = v; }
          if (c.type == v1::PIXEL_TYPE_U32) { std::uint32_t v; std::memcpy(&v, px.data() + 4 * i, 4); have = v; }
          if (c.type == v1::PIXEL_TYPE_F32) { float v; std::memcpy(&v, px.data() + 4 * i, 4); have = v; }
          if (have != want) ++wrong;
        }
      CHECK(wrong == 0);
    }
    // And back: slopecast exports the recording as a cube in the camera's
    // pixel type, which astropy reads with the same pixels.
    const auto back = dir / (std::string(c.name) + "_back.fits");
    testing::ChildProcess ex(SLOPECAST_PATH, {"export", out.string(), "--fits-cube", back.string()},
                             dir / "export.log");
    REQUIRE(ex.wait(30s) == 0);
    const auto raw = dir / (std::string(c.name) + ".raw");
    const std::string said = run_python("read " + back.string() + " " + raw.string(), dir / "astropy_read.log");
    CHECK_THAT(said, Catch::Contains(c.astropy_says));
    std::string expected;
    for (const auto& f : got.frames) expected += f.parts[1];
    CHECK(testing::read_log(raw) == expected);
  }
}

TEST_CASE("a recorder killed with SIGKILL leaves a file read up to its last whole record",
          "[integration][recording]") {
  testing::TempDir dir;
  std::string endpoint = "ipc://";
  endpoint += (dir / "frames.ipc").string();
  const auto out = dir / "killed.screc";
  testing::ChildProcess rec(SLOPECAST_PATH, {"record", "--frames-from", endpoint, "--out", out.string()},
                            dir / "rec.log");
  std::vector<std::string> args = {"sim", "--frames-out", endpoint, "--rate-hz", "2000", "--distinct-frames", "20"};
  args.insert(args.end(), kGrid.begin(), kGrid.end());
  testing::ChildProcess sim(SLOPECAST_PATH, args, dir / "sim.log");
  // Wait until the file holds some records, then kill mid-stream.
  const auto deadline = std::chrono::steady_clock::now() + 30s;
  while (std::chrono::steady_clock::now() < deadline &&
         (!std::filesystem::exists(out) || std::filesystem::file_size(out) < 200000))
    std::this_thread::sleep_for(20ms);
  rec.signal(SIGKILL);
  REQUIRE(rec.wait(10s) == 128 + SIGKILL);
  sim.signal(SIGTERM);
  (void)sim.wait(10s);
  const auto got = read_recording(out);
  INFO("record log:\n" << testing::read_log(dir / "rec.log"));
  CHECK(got.damaged == 0);
  CHECK(got.torn <= 1);
  REQUIRE(got.frames.size() > 10);
  // Every frame read is whole and in sequence.
  std::uint64_t last = 0;
  for (std::size_t k = 0; k < got.frames.size(); ++k) {
    v1::FrameHeader fh;
    REQUIRE(fh.ParseFromString(got.frames[k].parts[0]));
    CHECK(got.frames[k].parts[1].size() == 96u * 96u * 2u);
    if (k) CHECK(fh.seq() > last);
    last = fh.seq();
  }
}

TEST_CASE("a long recording rotates into numbered files that read back as one stream", "[integration][recording]") {
  testing::TempDir dir;
  std::string endpoint = "ipc://";
  endpoint += (dir / "frames.ipc").string();
  const auto out = dir / "long.screc";
  // 96 x 96 u16 frames are 18 kB: 150 of them make ~2.8 MB, three 1 MiB files.
  testing::ChildProcess rec(SLOPECAST_PATH,
                            {"record", "--frames-from", endpoint, "--out", out.string(), "--frames", "150",
                             "--rotate-bytes", "1048576"},
                            dir / "rec.log");
  std::vector<std::string> args = {"sim", "--frames-out", endpoint, "--rate-hz", "1000", "--frames", "150",
                                   "--distinct-frames", "10", "--block-when-full"};
  args.insert(args.end(), kGrid.begin(), kGrid.end());
  testing::ChildProcess sim(SLOPECAST_PATH, args, dir / "sim.log");
  INFO("record log:\n" << testing::read_log(dir / "rec.log") << "\nsim log:\n" << testing::read_log(dir / "sim.log"));
  REQUIRE(sim.wait(60s) == 0);
  REQUIRE(rec.wait(30s) == 0);
  std::uint64_t next_seq = 0, records = 0;
  unsigned parts = 0;
  for (unsigned part = 0; std::filesystem::exists(io::rotated_path(out, part)); ++part) {
    const auto path = io::rotated_path(out, part);
    auto opened = io::RecordingReader::open(path);
    REQUIRE(std::holds_alternative<std::unique_ptr<io::RecordingReader>>(opened));
    auto& r = *std::get<std::unique_ptr<io::RecordingReader>>(opened);
    CHECK(r.indexed());  // closed cleanly
    CHECK(r.header().part() == part);
    CHECK(r.header().first_record() == records);
    CHECK(r.header().width_px() == 96);
    if (part + 1 < 3) CHECK(std::filesystem::file_size(path) < 1048576 + 20000);  // one frame past the limit at most
    io::RecordedMessage m;
    while (r.next(m) == io::ReadOutcome::kRecord) {
      v1::FrameHeader fh;
      REQUIRE(fh.ParseFromString(m.parts[0]));
      CHECK(fh.seq() == next_seq);
      ++next_seq;
      ++records;
    }
    ++parts;
  }
  CHECK(parts == 3);
  CHECK(records == 150);
}

TEST_CASE("bad scenarios, recordings and cubes are refused with a sentence and nothing is overwritten",
          "[integration][recording][cli]") {
  testing::TempDir dir;
  struct Bad {
    std::string file, text;
    std::vector<std::string> args;
    std::string says;
  };
  const std::vector<Bad> cases = {
      {"typo.toml", "[atmosphere]\nr0 = 0.1\n", {"sim", "--scenario"}, "[atmosphere] has an unknown key 'r0'"},
      {"table.toml", "[weather]\nr0_m = 0.1\n", {"sim", "--scenario"}, "unknown table or key 'weather'"},
      {"layer.toml", "[layer]\nfraction = 1\n", {"sim", "--scenario"}, "layers are written [[layer]]"},
      {"coarse.toml", "[optics]\nsamples_per_subaperture = 4\n", {"sim", "--scenario"}, "use more samples"},
      {"not_a_recording.screc", "hello", {"replay", "--frames-out", "ipc:///tmp/x", "--wait-subscriber-s", "0"},
       "not a slopecast recording"},
      {"cube.fits", std::string("SIMPLE  =                    T") + std::string(2850, ' '), {"replay"},
       "cannot read FITS cube"},
  };
  int k = 0;
  for (const auto& c : cases) {
    std::ofstream(dir / c.file) << c.text;
    std::vector<std::string> args = c.args;
    if (args[0] == "sim") {
      args.push_back((dir / c.file).string());
      args.insert(args.end(), kGrid.begin(), kGrid.end());
    } else {
      args.insert(args.begin() + 1, (dir / c.file).string());
    }
    const auto log = dir / ("run" + std::to_string(k++) + ".log");
    testing::ChildProcess p(SLOPECAST_PATH, args, log);
    const auto rc = p.wait(20s);
    const std::string text = testing::read_log(log);
    INFO(c.file << ": " << text);
    CHECK(rc.has_value());
    CHECK(rc != 0);
    CHECK_THAT(text, Catch::Contains(c.says));
    CHECK_THAT(text, !Catch::Contains("terminate called"));
  }
  // record and export refuse to write over an existing file.
  std::ofstream(dir / "keep.screc") << "precious";
  testing::ChildProcess rec(SLOPECAST_PATH, {"record", "--frames-from", "ipc:///tmp/none", "--out",
                                              (dir / "keep.screc").string()},
                            dir / "rec.log");
  CHECK(rec.wait(10s) == 2);
  CHECK_THAT(testing::read_log(dir / "rec.log"), Catch::Contains("never overwritten"));
  CHECK(testing::read_log(dir / "keep.screc") == "precious");
  testing::ChildProcess nowhere(SLOPECAST_PATH, {"record", "--frames-from", "ipc:///tmp/none", "--out",
                                                  (dir / "no-such-folder" / "x.screc").string()},
                                dir / "nowhere.log");
  CHECK(nowhere.wait(10s) == 2);
  CHECK_THAT(testing::read_log(dir / "nowhere.log"), Catch::Contains("no such folder"));
}
