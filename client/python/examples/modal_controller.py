#!/usr/bin/python3
"""An example loop controller's front end: subscribes to slopecastd's
measurements, reconstructs the wavefront by least squares on the slopes of
the valid subapertures as Zernike modes (Noll 1976 ordering and
normalisation; the modal least-squares fit as in e.g. Southwell 1980, JOSA
70, 998), and prints tip/tilt and the leading modes.

    PYTHONPATH=build/python python3 client/python/examples/modal_controller.py --config bench.toml

Slopes in nm (the daemon's [optics] slope_unit = "nm", the optical path
difference across a subaperture) give coefficients in nm rms; in px they
come out in px of spot shift across a subaperture. The pupil is taken to
fill the lenslet grid; each subaperture is modelled by the mean gradient of
each mode over its square (16 points), which keeps the modes beyond
defocus from aliasing into each other.
"""
import argparse
import math
import sys

import numpy as np

import slopecast


def noll_to_nm(j):
    n = 0
    while j > (n + 1) * (n + 2) // 2:
        n += 1
    k = j - n * (n + 1) // 2 - 1
    m = 2 * ((k + 1) // 2) if n % 2 == 0 else 2 * (k // 2) + 1
    return n, m


def zernike(j, x, y):
    """Noll's Z_j at Cartesian points of the unit disc."""
    n, m = noll_to_nm(j)
    r, t = np.hypot(x, y), np.arctan2(y, x)
    radial = sum((-1) ** s * math.factorial(n - s)
                 / (math.factorial(s) * math.factorial((n + m) // 2 - s) * math.factorial((n - m) // 2 - s))
                 * r ** (n - 2 * s) for s in range((n - m) // 2 + 1))
    if m == 0:
        return math.sqrt(n + 1) * radial
    return math.sqrt(2 * (n + 1)) * radial * (np.cos(m * t) if j % 2 == 0 else np.sin(m * t))


def interaction_matrix(nx, ny, modes):
    """Rows: the x then y optical-path difference across each subaperture
    per unit coefficient, subapertures in (iy, ix) order; columns j = 2..modes."""
    radius = max(nx, ny) / 2.0
    w = 1.0 / radius  # a subaperture's width in pupil radii
    offsets = (np.arange(4) + 0.5) / 4 - 0.5
    h = 1e-6
    dx = np.zeros((ny, nx, modes - 1))
    dy = np.zeros((ny, nx, modes - 1))
    for iy in range(ny):
        for ix in range(nx):
            px = ((ix + 0.5 + offsets[None, :]) - nx / 2.0) / radius
            py = ((iy + 0.5 + offsets[:, None]) - ny / 2.0) / radius
            px, py = np.broadcast_arrays(px, py)
            for j in range(2, modes + 1):
                dx[iy, ix, j - 2] = np.mean((zernike(j, px + h, py) - zernike(j, px - h, py)) / (2 * h)) * w
                dy[iy, ix, j - 2] = np.mean((zernike(j, px, py + h) - zernike(j, px, py - h)) / (2 * h)) * w
    return dx, dy


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--config", help="slopecastd config (for its measurements endpoint)")
    parser.add_argument("--measurements", default=slopecast.DEFAULT_ENDPOINTS["measurements_out"])
    parser.add_argument("--frames", type=int, default=100, help="measurements to average")
    parser.add_argument("--modes", type=int, default=15, help="Noll modes j = 2 .. this")
    parser.add_argument("--timeout-s", type=float, default=10.0)
    args = parser.parse_args()
    endpoint = slopecast.endpoints_from_config(args.config)["measurements_out"] if args.config else args.measurements
    dx = dy = None
    total = None
    used = 0
    with slopecast.MeasurementStream(endpoint) as stream:
        while used < args.frames:
            m = stream.receive(args.timeout_s)
            if m is None:
                print(f"no measurement from {endpoint} within {args.timeout_s} s", file=sys.stderr)
                return 1
            if dx is None:
                ny, nx = m.slope_x.shape
                dx, dy = interaction_matrix(nx, ny, args.modes)
                unit = "nm" if m.slope_unit == "nm" else f"{m.slope_unit} across a subaperture"
            v = m.valid
            if v.sum() * 2 < args.modes:
                continue
            a = np.vstack([dx[v], dy[v]])
            s = np.concatenate([m.slope_x[v], m.slope_y[v]]).astype(float)
            coefficients, *_ = np.linalg.lstsq(a, s, rcond=None)
            total = coefficients if total is None else total + coefficients
            used += 1
            if used % max(1, args.frames // 5) == 0:
                print(f"frame {m.seq}{' of ' + m.sensor if m.sensor else ''}: tip {coefficients[0]:+.1f}  "
                      f"tilt {coefficients[1]:+.1f} {unit} rms")
    mean = total / used
    print(f"mean over {used} frames, {unit} rms:")
    print(f"  tip (Z2) {mean[0]:+.2f}  tilt (Z3) {mean[1]:+.2f}")
    for j in range(4, args.modes + 1):
        print(f"  Z{j} {mean[j - 2]:+.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
