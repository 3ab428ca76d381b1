// Recordings: what `slopecast record` writes and `slopecast replay` /
// `slopecast export` read. A file of our own design, built so that a crash
// or a kill -9 costs at most the record being written, and a damaged byte is
// found and named, never silently replayed.
//
// Layout (every integer little-endian):
//
//   file    := magic header record* [index footer]
//   magic   := the 8 bytes "SLCREC1\n"
//   header  := u32 length, RecordingHeader (protobuf, proto/slopecast/v1/
//              recording.proto), u32 CRC-32 of those protobuf bytes
//   record  := u32 sync 0x31524353 ("SCR1"), u32 body length L,
//              body (L bytes), u32 CRC-32 of (the length field + body)
//   body    := u8 kind (1 frame, 2 measurement, 3 index, 4 truth), u8 part count P, u16 zero, u64 received_ns,
//              P x (u32 part length, part bytes)
//   index   := a record of kind kIndex whose one part lists the u64 file
//              offset of every data record, in order
//   footer  := u64 offset of the index record, u64 number of data records,
//              the 8 bytes "SLCRIDX\n"
//
// CRC-32 is the ISO-HDLC / zlib polynomial (computed by zlib's crc32()).
// The parts are the ZeroMQ message parts exactly as they arrived (a frame:
// FrameHeader + pixels; a measurement: the one Measurement part), so a replay
// is bit-exact. A reader uses the index when the footer checks out and scans
// record by record otherwise; it never needs the index.
//
// What a reader does with damage: a record cut short by the end of the file
// (a torn tail) ends the file with a warning; a whole record whose checksum
// fails, or whose framing is wrong, is reported with its record number and
// byte offset, and the reader looks for the next intact record (a sync word
// whose length and checksum agree) and goes on.
#pragma once

#include <cstdint>
#include <cstdio>
#include <filesystem>
#include <memory>
#include <span>
#include <string>
#include <string_view>
#include <variant>
#include <vector>

#include "slopecast/v1/recording.pb.h"

namespace slopecast::io {

// kTruth: a FrameTruth (proto/slopecast/v1/recording.proto) from a simulator.
enum class RecordKind : std::uint8_t { kFrame = 1, kMeasurement = 2, kIndex = 3, kTruth = 4 };

struct RecordedMessage {
  RecordKind kind = RecordKind::kFrame;
  std::uint64_t received_ns = 0;  // when the recorder received it, Unix epoch ns (recorder clock)
  std::vector<std::string> parts;
};

// Largest record body accepted by writer and reader (a 16384 x 16384 f32
// frame is 1 GiB; anything larger is damage, not data).
inline constexpr std::uint32_t kMaxRecordBody = 1u << 30;
inline constexpr std::uint32_t kMaxRecordParts = 16;

class RecordingWriter {
 public:
  // Creates path; refuses to replace an existing file (a recording is never
  // overwritten by accident). Writes magic and header at once.
  static std::variant<std::unique_ptr<RecordingWriter>, std::string> create(const std::filesystem::path& path,
                                                                            const v1::RecordingHeader& header);
  ~RecordingWriter();
  RecordingWriter(const RecordingWriter&) = delete;
  RecordingWriter& operator=(const RecordingWriter&) = delete;

  // Appends one record with a single write(2) (no user-space buffer, so a
  // kill loses nothing already appended). Empty on success, else why.
  std::string append(RecordKind kind, std::uint64_t received_ns, std::span<const std::string_view> parts);
  // Writes the index and the footer, flushes to disk and closes. Empty on
  // success. Called by the destructor if not called before.
  std::string close();

  std::uint64_t bytes() const { return offset_; }
  std::uint64_t records() const { return offsets_.size(); }
  const std::filesystem::path& path() const { return path_; }

 private:
  RecordingWriter() = default;
  std::string write_all(std::span<const std::byte> bytes);
  std::filesystem::path path_;
  int fd_ = -1;
  std::uint64_t offset_ = 0;
  std::vector<std::uint64_t> offsets_;
  std::vector<std::byte> buffer_;
};

enum class ReadOutcome {
  kRecord,    // out holds the next data record
  kEnd,       // no more records (clean end, or after a torn tail)
  kTornTail,  // the last record is incomplete; problem() says where; kEnd follows
  kCorrupt,   // a damaged record was skipped; problem() names it; reading goes on
};

class RecordingReader {
 public:
  static std::variant<std::unique_ptr<RecordingReader>, std::string> open(const std::filesystem::path& path);
  ~RecordingReader();
  RecordingReader(const RecordingReader&) = delete;
  RecordingReader& operator=(const RecordingReader&) = delete;

  const v1::RecordingHeader& header() const { return header_; }
  // Next data record (index records are skipped).
  ReadOutcome next(RecordedMessage& out);
  // Data records returned so far, and the number (0-based, within this
  // file) of the last one.
  std::uint64_t records_read() const { return records_read_; }
  const std::string& problem() const { return problem_; }
  // True when the file ends with a valid index (written by a clean close);
  // indexed_records() is then the number of data records it lists.
  bool indexed() const { return indexed_; }
  std::uint64_t indexed_records() const { return index_.size(); }
  // With an index: positions the reader so that next() returns data record
  // n. False without an index or when n is out of range.
  bool seek(std::uint64_t n);

 private:
  RecordingReader() = default;
  bool read_at(std::uint64_t offset, std::span<std::byte> out);
  // Parses the record at offset_; see ReadOutcome.
  ReadOutcome parse_record(RecordedMessage& out, std::uint64_t& next_offset, std::string& why, bool& torn);
  // Offset of the first intact record at or after from; data_end_ if none.
  std::uint64_t find_intact_record(std::uint64_t from);
  std::filesystem::path path_;
  std::FILE* file_ = nullptr;
  std::uint64_t size_ = 0;
  std::uint64_t offset_ = 0;
  std::uint64_t data_end_ = 0;  // where records stop (the index's offset when indexed)
  std::uint64_t records_read_ = 0;
  v1::RecordingHeader header_;
  std::vector<std::uint64_t> index_;
  bool indexed_ = false;
  bool ended_ = false;
  std::string problem_;
  std::vector<std::byte> body_;
};

// The CRC-32 (zlib) of bytes.
std::uint32_t crc32_of(std::span<const std::byte> bytes, std::uint32_t seed = 0);

// The files of a rotated series, in order: "<stem>.0000.screc",
// "<stem>.0001.screc", ... for path "<stem>.screc".
std::filesystem::path rotated_path(const std::filesystem::path& path, unsigned part);

}  // namespace slopecast::io
