"""Reads FITS files written by slopecast with astropy (Debian's
python3-astropy, an independent FITS implementation) and checks them against
the FITS Standard 4.0 conventions; then writes files of its own for slopecast
to read back. Called by calibration_set_test with the folder as argument.
Exits non-zero with a message on the first mismatch."""
import sys

import numpy as np
from astropy.io import fits

d = sys.argv[1]


def check(cond, what):
    if not cond:
        print("astropy check failed:", what)
        sys.exit(1)


# Unsigned 16-bit: BITPIX 16 with BZERO 32768 (FITS 4.0 sec. 5.3, Table 11).
with fits.open(f"{d}/u16.fits") as h:
    hdr = h[0].header
    check(hdr["BITPIX"] == 16, f"u16.fits BITPIX {hdr['BITPIX']}")
    check(hdr["BZERO"] == 32768, f"u16.fits BZERO {hdr.get('BZERO')}")
    check(hdr.get("BSCALE", 1) == 1, "u16.fits BSCALE")
    data = h[0].data
    check(data.dtype == np.uint16, f"u16.fits read as {data.dtype}")
    check(data.shape == (2, 3), f"u16.fits shape {data.shape} (NAXIS2, NAXIS1)")
    check(data.tolist() == [[0, 1, 2], [32767, 32768, 65535]], f"u16.fits values {data.tolist()}")

# A calibration set's files.
s = f"{d}/set"
with fits.open(f"{s}/dark.fits") as h:
    hdr = h[0].header
    check(hdr["BITPIX"] == -32, "dark BITPIX")
    check(h[0].data.shape == (4, 5), f"dark shape {h[0].data.shape}")
    check(np.array_equal(h[0].data, (np.arange(20, dtype=np.float32) * 0.5 - 3).reshape(4, 5)), "dark values")
    check(hdr["NCOMBINE"] == 100, "dark NCOMBINE")
    check(abs(hdr["EXPTIME"] - 0.002) < 1e-12, "dark EXPTIME")
    check(hdr["DATE"] == "2026-12-02T07:30:00", f"dark DATE {hdr['DATE']}")
    check("slopecast calibrate dark" in str(hdr["HISTORY"]), "dark HISTORY")
with fits.open(f"{s}/valid_map.fits") as h:
    check(h[0].header["BITPIX"] == 8, "valid map BITPIX")
    check(h[0].data.tolist() == [[1, 0, 1], [1, 1, 0]], f"valid map {h[0].data.tolist()}")
with fits.open(f"{s}/reference_slopes.fits") as h:
    data = h[0].data
    check(data.shape == (2, 2, 3), f"reference slopes shape {data.shape}")
    check(np.allclose(data[0].ravel(), [0.1, -0.2, 0.3, 0, 0.05, -0.5]), f"reference x {data[0].ravel()}")
    check(np.allclose(data[1].ravel(), [1, 2, 3, 4, 5, 6]), f"reference y {data[1].ravel()}")
with fits.open(f"{s}/layout.fits") as h:
    t = h["LAYOUT"].data
    check(list(t.columns.names) == ["X0", "Y0", "WIDTH", "HEIGHT", "REF_X", "REF_Y"], f"columns {t.columns.names}")
    check(t["X0"].tolist() == [0, 2, 3, 0, 2, 3], f"X0 {t['X0'].tolist()}")
    check(np.allclose(t["REF_X"], [0.5, 2.6, 4.4, 0.5, 2.5, 4.5]), f"REF_X {t['REF_X'].tolist()}")
    check(h["LAYOUT"].columns["REF_X"].unit == "px", "REF_X unit")

# Sigma clipping as astropy does it, on values slopecast wrote, for
# slopecast's own sigma_clip to compare with (R9.2).
from astropy.stats import sigma_clip
with fits.open(f"{d}/clip.fits") as h:
    values = h[0].data.astype(np.float64).ravel()
clipped = sigma_clip(values, sigma=3, maxiters=5, cenfunc="median", stdfunc="std")
kept = clipped.compressed()
with open(f"{d}/clip.txt", "w") as out:
    out.write(f"{np.median(kept):.10g} {np.std(kept):.10g} {kept.size}\n")

# Files astropy writes, for slopecast to read.
fits.PrimaryHDU(np.array([[0, 1, 40000], [65535, 7, 8]], dtype=np.uint16)).writeto(f"{d}/astropy_u16.fits", overwrite=True)
fits.PrimaryHDU(np.array([[1.5, -2.25], [3e4, 0.125]], dtype=np.float64)).writeto(f"{d}/astropy_f64.fits", overwrite=True)
cols = [fits.Column(name="X0", format="J", array=np.array([10, 20])),
        fits.Column(name="Y0", format="J", array=np.array([30, 30])),
        fits.Column(name="WIDTH", format="I", array=np.array([8, 8], dtype=np.int16)),
        fits.Column(name="HEIGHT", format="I", array=np.array([8, 8], dtype=np.int16)),
        fits.Column(name="REF_X", format="E", array=np.array([13.5, 23.25], dtype=np.float32)),
        fits.Column(name="REF_Y", format="D", array=np.array([33.5, 33.75]))]
fits.HDUList([fits.PrimaryHDU(), fits.BinTableHDU.from_columns(cols, name="LAYOUT")]).writeto(
    f"{d}/astropy_layout.fits", overwrite=True)
print("astropy checks passed")
