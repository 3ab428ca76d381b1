"""slopecast from Python: measurements as numpy arrays, status and control
requests, and frames published from numpy arrays (a camera adapter).

Uses Debian's python3-zmq, python3-protobuf and python3-numpy only. The
protobuf modules (slopecast.v1.*_pb2) are generated from the repository's
proto/ files when slopecast is built (build/python/ holds the package).

    import slopecast
    ends = slopecast.endpoints_from_config("bench.toml")
    with slopecast.MeasurementStream(ends["measurements_out"]) as stream:
        m = stream.receive(timeout_s=2.0)
        print(m.seq, m.slope_x.shape, m.valid.sum())

The contract the classes follow is in proto/slopecast/v1/*.proto: frames
are two-part messages (FrameHeader, raw pixels) on a socket the camera
binds; measurements are single-part Measurement messages on the daemon's
PUB; control is request/reply; insight reports are (topic, message) pairs.
"""
from __future__ import annotations

import dataclasses
import time
import tomllib
from typing import Optional

import numpy as np
import zmq
from google.protobuf import json_format

from slopecast.v1 import control_pb2, frame_pb2, insight_pb2, measurement_pb2

__all__ = [
    "endpoints_from_config",
    "Measurement",
    "MeasurementStream",
    "Control",
    "FramePublisher",
    "InsightStream",
    "SlopecastError",
]

DEFAULT_ENDPOINTS = {
    "frames_in": "tcp://127.0.0.1:10140",
    "measurements_out": "tcp://127.0.0.1:10141",
    "control": "tcp://127.0.0.1:10142",
    "insight_out": "tcp://127.0.0.1:10143",
}


class SlopecastError(RuntimeError):
    """A refusal or a transport failure, with the daemon's sentence."""


def endpoints_from_config(path: str) -> dict:
    """The [endpoints] of a slopecastd config file, defaults filled in."""
    with open(path, "rb") as f:
        table = tomllib.load(f).get("endpoints", {})
    return {key: table.get(key, value) for key, value in DEFAULT_ENDPOINTS.items()}


@dataclasses.dataclass
class Measurement:
    """One frame's measurement. Per-subaperture arrays have shape
    (n_subap_y, n_subap_x): entry [iy, ix] is subaperture (ix, iy)."""

    seq: int
    camera_time_ns: int
    received_time_ns: int
    published_time_ns: int
    slope_unit: str        # "px", "rad", "nm" or "arcsec"
    units_per_px: float    # slope_unit per px of spot shift
    slope_x: np.ndarray    # float32, slope_unit; 0 where not valid
    slope_y: np.ndarray
    flux_adu: np.ndarray
    valid: np.ndarray      # bool
    flags: np.ndarray      # uint32, SubapertureFlag bits (0 when valid)
    health: int
    sensor: str            # the daemon's [daemon] sensor_name ("" when not set)
    message: measurement_pb2.Measurement

    @staticmethod
    def from_message(m: measurement_pb2.Measurement) -> "Measurement":
        shape = (m.n_subap_y, m.n_subap_x)

        def grid(values, dtype):
            a = np.asarray(values, dtype=dtype)
            return a.reshape(shape) if a.size == shape[0] * shape[1] else a

        return Measurement(
            seq=m.frame_seq,
            camera_time_ns=m.camera_time_ns,
            received_time_ns=m.received_time_ns,
            published_time_ns=m.published_time_ns,
            slope_unit=measurement_pb2.SlopeUnit.Name(m.slope_unit).removeprefix("SLOPE_UNIT_").lower(),
            units_per_px=m.units_per_px or 1.0,
            slope_x=grid(m.slope_x, np.float32),
            slope_y=grid(m.slope_y, np.float32),
            flux_adu=grid(m.flux_adu, np.float32),
            valid=grid(m.valid, bool),
            flags=grid(m.flags, np.uint32),
            health=m.health,
            sensor=m.sensor_name,
            message=m,
        )


class _Socket:
    def __init__(self, kind):
        self._ctx = zmq.Context.instance()
        self._socket = self._ctx.socket(kind)
        self._socket.setsockopt(zmq.LINGER, 0)

    def close(self):
        self._socket.close(0)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


class MeasurementStream(_Socket):
    """Subscribes to a daemon's measurements_out."""

    def __init__(self, endpoint: str):
        super().__init__(zmq.SUB)
        self._socket.setsockopt(zmq.RCVHWM, 10000)
        self._socket.setsockopt(zmq.SUBSCRIBE, b"")
        self._socket.connect(endpoint)

    def receive(self, timeout_s: float = 1.0) -> Optional[Measurement]:
        """The next measurement, or None when none arrives in time."""
        if not self._socket.poll(int(timeout_s * 1000)):
            return None
        parts = self._socket.recv_multipart()
        m = measurement_pb2.Measurement()
        try:
            if len(parts) != 1:
                raise ValueError(f"{len(parts)} parts")
            m.ParseFromString(parts[0])
        except Exception as e:  # DecodeError or the part count
            raise SlopecastError(f"a message on the measurement socket is not a Measurement ({e})") from e
        return Measurement.from_message(m)


class InsightStream(_Socket):
    """Subscribes to a daemon's insight_out: (topic, message) pairs."""

    _types = {
        "modes": insight_pb2.ModesReport,
        "turbulence": insight_pb2.TurbulenceReport,
        "noise": insight_pb2.NoiseReport,
        "shadow": insight_pb2.ShadowReport,
        "preview": insight_pb2.Preview,
    }

    def __init__(self, endpoint: str, topics=("modes", "turbulence", "noise", "shadow")):
        super().__init__(zmq.SUB)
        for t in topics:
            self._socket.setsockopt(zmq.SUBSCRIBE, t.encode())
        self._socket.connect(endpoint)

    def receive(self, timeout_s: float = 1.0):
        """(topic, message) or None."""
        if not self._socket.poll(int(timeout_s * 1000)):
            return None
        topic, payload = self._socket.recv_multipart()[:2]
        message = self._types[topic.decode()]()
        message.ParseFromString(payload)
        return topic.decode(), message


class Control(_Socket):
    """Requests to a daemon's control endpoint. Every call returns the reply
    or raises SlopecastError with the daemon's sentence."""

    def __init__(self, endpoint: str, timeout_s: float = 2.0):
        self._endpoint = endpoint
        self._timeout_ms = int(timeout_s * 1000)
        self._open()

    def _open(self):
        super().__init__(zmq.REQ)
        self._socket.connect(self._endpoint)

    def request(self, req: control_pb2.ControlRequest) -> control_pb2.ControlReply:
        self._socket.send(req.SerializeToString())
        if not self._socket.poll(self._timeout_ms):
            self.close()  # a REQ socket cannot send again before a reply: start afresh
            self._open()
            raise SlopecastError(f"no reply from {self._endpoint} within {self._timeout_ms} ms")
        reply = control_pb2.ControlReply()
        reply.ParseFromString(self._socket.recv())
        if not reply.ok:
            raise SlopecastError(reply.error)
        return reply

    def status(self) -> dict:
        """The daemon's status as a dict (protobuf JSON mapping, .proto names)."""
        req = control_pb2.ControlRequest()
        req.status.SetInParent()
        return json_format.MessageToDict(self.request(req).status, preserving_proto_field_name=True)

    def set_centroider(self, method: Optional[str] = None, shadow: bool = False, **options) -> str:
        """Changes the live (or, with shadow=True, the shadow) centroider:
        set_centroider("wcog", weight_sigma_px=2.0). Returns the summary."""
        req = control_pb2.ControlRequest()
        set_ = req.set_centroider
        set_.shadow = shadow
        items = ([("method", method)] if method else []) + list(options.items())
        for key, value in items:
            o = set_.options.add()
            o.key = key
            if isinstance(value, bool):
                o.flag = value
            elif isinstance(value, (int, float)):
                o.number = float(value)
            else:
                o.text = str(value)
        return self.request(req).centroider.summary


_PIXEL_TYPES = {
    np.dtype(np.uint8): frame_pb2.PIXEL_TYPE_U8,
    np.dtype(np.uint16): frame_pb2.PIXEL_TYPE_U16,
    np.dtype(np.uint32): frame_pb2.PIXEL_TYPE_U32,
    np.dtype(np.float32): frame_pb2.PIXEL_TYPE_F32,
}


class FramePublisher(_Socket):
    """Publishes camera frames, as a camera adapter would: binds the
    daemon's frames_in endpoint (XPUB) and waits for its subscription.

        with FramePublisher("tcp://127.0.0.1:10140", source_id="lab-cam") as cam:
            cam.wait_for_subscriber()
            for seq, image in enumerate(grab()):   # 2-D uint8/uint16/uint32/float32
                cam.publish(image, seq)
    """

    def __init__(self, endpoint: str, source_id: str = "python", high_water_mark: int = 100):
        super().__init__(zmq.XPUB)
        self._socket.setsockopt(zmq.SNDHWM, high_water_mark)
        self._socket.setsockopt(zmq.XPUB_NODROP, 1)
        self._socket.bind(endpoint)
        self._source_id = source_id

    def wait_for_subscriber(self, timeout_s: float = 10.0) -> bool:
        """True once a subscription (the daemon's) has arrived."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self._socket.poll(100) and self._socket.recv()[:1] == b"\x01":
                return True
        return False

    def publish(self, image: np.ndarray, seq: int, camera_time_ns: Optional[int] = None,
                exposure_us: float = 0.0, timeout_s: float = 5.0) -> None:
        """Sends one frame; waits (up to timeout_s) for room rather than
        dropping it. The array must be 2-D, of a camera pixel type."""
        if image.ndim != 2 or image.dtype not in _PIXEL_TYPES:
            raise SlopecastError(f"a frame is a 2-D array of uint8, uint16, uint32 or float32, not {image.dtype} "
                                 f"with {image.ndim} dimensions")
        header = frame_pb2.FrameHeader(
            contract_version=1, seq=seq, camera_time_ns=camera_time_ns or time.time_ns(),
            width_px=image.shape[1], height_px=image.shape[0], pixel_type=_PIXEL_TYPES[image.dtype],
            exposure_us=exposure_us, source_id=self._source_id)
        pixels = np.ascontiguousarray(image.astype(image.dtype.newbyteorder("<"), copy=False))
        deadline = time.monotonic() + timeout_s
        while True:
            try:
                self._socket.send_multipart([header.SerializeToString(), pixels.tobytes()], flags=zmq.NOBLOCK)
                return
            except zmq.Again:
                if time.monotonic() > deadline:
                    raise SlopecastError("the subscriber's queue stayed full: frame not sent")
                self._socket.poll(10, zmq.POLLOUT)
