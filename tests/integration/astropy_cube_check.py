#!/usr/bin/python3
"""FITS cubes between slopecast and astropy (Debian's python3-astropy), an
implementation independent of cfitsio.

  astropy_cube_check.py write DIR
      writes cube_8.fits (uint8, BITPIX 8), cube_16.fits (uint16: astropy
      stores BITPIX 16 with BZERO 32768), cube_32.fits (int32, BITPIX 32) and
      cube_m32.fits (float32, BITPIX -32), each 20 x 12 pixels x 5 planes,
      pixel (x, y, z) = a function of p = (x + 7 y + 13 z) % 251 (below).
  astropy_cube_check.py read CUBE OUT
      reads a cube written by slopecast export: writes its pixels to OUT as
      little-endian bytes of the data's own type, plane after plane, and
      prints BITPIX, BZERO, the shape and the FRAMES table's FRAME_SEQ.
"""
import sys

import numpy as np
from astropy.io import fits


def pattern(shape):
    z, y, x = np.indices(shape)
    return (x + 7 * y + 13 * z) % 251


def write(folder):
    p = pattern((5, 12, 20))  # numpy order: plane, row, column
    fits.PrimaryHDU(p.astype(np.uint8)).writeto(f"{folder}/cube_8.fits")
    fits.PrimaryHDU((40000 + 97 * p).astype(np.uint16)).writeto(f"{folder}/cube_16.fits")
    fits.PrimaryHDU((100000 * p + 12345).astype(np.int32)).writeto(f"{folder}/cube_32.fits")
    fits.PrimaryHDU((p + 0.25).astype(np.float32)).writeto(f"{folder}/cube_m32.fits")
    for name in ("cube_8", "cube_16", "cube_32", "cube_m32"):
        h = fits.getheader(f"{folder}/{name}.fits")
        print(name, "BITPIX", h["BITPIX"], "BZERO", h.get("BZERO", 0))


def read(cube, out):
    with fits.open(cube) as f:
        data = f[0].data
        h = f[0].header
        print("BITPIX", h["BITPIX"], "BZERO", h.get("BZERO", 0), "shape", data.shape, "dtype", data.dtype)
        data.astype(data.dtype.newbyteorder("<")).tofile(out)
        seq = f["FRAMES"].data["FRAME_SEQ"]
        print("FRAME_SEQ", " ".join(str(int(s)) for s in seq))


if __name__ == "__main__":
    if sys.argv[1] == "write":
        write(sys.argv[2])
    else:
        read(sys.argv[2], sys.argv[3])
