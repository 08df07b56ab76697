"""Load a synthetic tilted image with scan-line offsets from .npy + sidecar, level it and print the residual.

Run with no arguments; it writes into a temporary folder and takes a second or two.
"""

from __future__ import annotations

import json
import pathlib
import tempfile

import numpy as np

from domains.io import load_scan
from domains.level import level


def make_image(shape=(128, 160), pixel_size_nm=0.05, seed=7):
    """A weak stripe pattern on a tilted plane, with a random offset on every scan line."""
    rng = np.random.default_rng(seed)
    rows, cols = np.mgrid[0 : shape[0], 0 : shape[1]]
    x_nm, y_nm = cols * pixel_size_nm, rows * pixel_size_nm
    pattern = 0.02 * np.cos(2 * np.pi * x_nm / 0.9)  # nm, varies along the fast-scan axis only
    tilt = 0.4 + 0.03 * x_nm - 0.05 * y_nm  # nm
    offsets = rng.normal(0.0, 0.05, shape[0])[:, None]  # nm, one per scan line
    return pattern, pattern + tilt + offsets


def main():
    pixel_size_nm = 0.05
    pattern, image = make_image(pixel_size_nm=pixel_size_nm)
    with tempfile.TemporaryDirectory() as folder:
        path = pathlib.Path(folder) / "tilted.npy"
        np.save(path, image)
        sidecar = {"pixel_size_nm": pixel_size_nm, "channel": "topography", "bias_V": 0.5, "setpoint_A": 1e-10}
        path.with_suffix(".json").write_text(json.dumps(sidecar))

        scan = load_scan(path)
        # The pattern has no y dependence, so per-line medians cannot harm it here;
        # warn=False acknowledges that they would delete a modulation along y.
        flat = level(scan, order=1, lines="median", warn=False)

    truth = pattern - pattern.mean()
    print(f"loaded {scan.shape} pixels of {scan.pixel_size_nm[0]} nm, bias {scan.bias_V} V")
    print(f"RMS before levelling:        {np.std(image - image.mean() - truth) * 1e3:8.3f} pm")
    print(f"residual RMS after levelling: {np.std(flat.data - flat.data.mean() - truth) * 1e3:8.3f} pm")


if __name__ == "__main__":
    main()
