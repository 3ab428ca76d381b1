#!/usr/bin/python3
"""Publishes frames from numpy arrays through slopecast.FramePublisher and
checks the daemon's measurements received through
slopecast.MeasurementStream against the spot offsets drawn into them.

    python_client_check.py FRAMES_ENDPOINT MEASUREMENTS_ENDPOINT CONTROL_ENDPOINT

The camera: 8 x 8 subapertures of 12 px (96 x 96, uint16), one Gaussian
spot per subaperture (rms 1.2 px, 30 000 photo-electrons, on a 100 ADU
bias), at known offsets within +-1.5 px; pixel-integrated with erf.
"""
import math
import sys

import numpy as np

import slopecast


def spots(dx, dy, sigma=1.2, photons=3e4, n=8, pitch=12):
    edges = np.arange(pitch + 1) - pitch / 2.0  # pixel edges from the box centre
    erf = np.vectorize(math.erf)
    img = np.zeros((n * pitch, n * pitch))
    for iy in range(n):
        for ix in range(n):
            cx = 0.5 * (1 + erf((edges - dx[iy, ix]) / (sigma * math.sqrt(2))))
            cy = 0.5 * (1 + erf((edges - dy[iy, ix]) / (sigma * math.sqrt(2))))
            img[iy * pitch:(iy + 1) * pitch, ix * pitch:(ix + 1) * pitch] = photons * np.outer(np.diff(cy), np.diff(cx))
    return np.round(img + 100).astype(np.uint16)


def main():
    frames_ep, measurements_ep, control_ep = sys.argv[1:4]
    rng = np.random.default_rng(7)
    control = slopecast.Control(control_ep)
    status = control.status()
    assert status["sensor_name"] == "python-bench", status["sensor_name"]
    with slopecast.MeasurementStream(measurements_ep) as stream, \
            slopecast.FramePublisher(frames_ep, source_id="numpy") as camera:
        if not camera.wait_for_subscriber(10):
            print("the daemon did not subscribe", file=sys.stderr)
            return 1
        # Let the measurement subscription reach the daemon first.
        for _ in range(100):
            if int(control.status().get("measurement_subscribers", 0)) >= 1:
                break
        truth = {}
        for seq in range(20):
            dx, dy = rng.uniform(-1.5, 1.5, (2, 8, 8))
            truth[seq] = (dx, dy)
            camera.publish(spots(dx, dy), seq)
        worst = 0.0
        got = 0
        while got < 20:
            m = stream.receive(10)
            if m is None:
                print(f"only {got} measurements came back", file=sys.stderr)
                return 1
            dx, dy = truth[m.seq]
            assert m.slope_x.shape == (8, 8), m.slope_x.shape
            assert m.valid.all(), m.flags
            assert m.sensor == "python-bench"
            worst = max(worst, float(np.abs(m.slope_x - dx).max()), float(np.abs(m.slope_y - dy).max()))
            got += 1
    # Photon noise at 3e4 e- is ~0.007 px rms (tests/REFERENCES.md R1.2);
    # the border background takes a little of the wings: 0.05 px.
    print(f"20 frames from numpy measured; worst slope error {worst:.4f} px")
    if worst > 0.05:
        return 1
    summary = control.set_centroider("wcog", weight_sigma_px=2.0)
    print("centroider now", summary)
    if not summary.startswith("wcog"):
        return 1
    try:
        control.set_centroider(weight_sigma_px=-1)
        print("a negative weight was accepted", file=sys.stderr)
        return 1
    except slopecast.SlopecastError as e:
        print("refused as expected:", e)
    return 0


if __name__ == "__main__":
    sys.exit(main())
