"""Benchmark of the lock-in kernel on a large float32 image: ratios against reference runs in one process.

Cases (3 wavevectors, 4096^2 float32, sigma = 8 px by default; targets from issue 10):

- kernel vs the textbook real-space lock-in (I cos and I sin through scipy.ndimage.gaussian_filter
  per q, normalised by the filtered frame); target ratio <= 0.1;
- kernel vs the full-resolution floor (one rfft2 of the image plus one complex ifft2 per q);
  target <= 1.5;
- decimated kernel (step = sigma / 2) vs one rfft2 (target <= 2) and vs the decimated floor
  (one rfft2 plus one complex ifft2 of (N / step)^2 per q);
- accuracy: the largest |2|A| - 2|A_textbook|| at >= 6 sigma from the edges, as a fraction of
  each wave's amplitude (target <= 1e-3), and the decimated result against the full-resolution
  one at the sampled pixels;
- optionally (``--padding-study``) the zero padding of the FFT grid (none = periodic, 4 sigma,
  6 sigma): time and the largest amplitude error in the interior and in the edge band.

Timings interleave the cases and keep each one's best, so that a shared machine's load drifts
into all of them alike. Run alone with ``python benchmarks/lockin_kernel.py [--size N]``.
"""

from __future__ import annotations

import argparse
import math
import time

import sys
from pathlib import Path

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:  # measure the checkout this file is in, not an installed copy
    sys.path.insert(0, str(ROOT))

import domains  # noqa: E402
from domains import _lockin  # noqa: E402


def textbook_lockin(image, q_px, sigma_px, truncate=6.0):
    """The plain real-space lock-in: Gaussian-filter I cos and I sin for each q, divide by the filtered frame."""
    y, x = np.mgrid[: image.shape[0], : image.shape[1]]
    norm = ndimage.gaussian_filter(np.ones(image.shape), sigma_px, truncate=truncate, mode="constant")
    out = []
    for qx, qy in q_px:
        arg = qx * x + qy * y
        re = ndimage.gaussian_filter(image * np.cos(arg), sigma_px, truncate=truncate, mode="constant")
        im = ndimage.gaussian_filter(image * np.sin(arg), sigma_px, truncate=truncate, mode="constant")
        out.append((re - 1j * im) / norm)
    return np.array(out)


def floor_fft(image, nq):
    """What any full-resolution Fourier lock-in must do: one real forward FFT, one complex inverse per q."""
    spectrum = sfft.rfft2(image, workers=-1)
    full = np.zeros(image.shape, np.complex64)
    full[:, : spectrum.shape[1]] = spectrum
    for _ in range(nq):
        sfft.ifft2(full, workers=-1)


def decimated_floor(image, nq, step):
    """The least a decimated Fourier lock-in must do: one rfft2, one complex ifft2 of (N / step)^2 per q."""
    spectrum = sfft.rfft2(image, workers=-1)
    rows, cols = -(-image.shape[0] // step), -(-image.shape[1] // step)
    window = np.zeros((rows, cols), np.complex64)
    half = min(cols, spectrum.shape[1])
    window[:, :half] = spectrum[:rows, :half]
    for _ in range(nq):
        sfft.ifft2(window, workers=-1)


def interleaved_best(cases, repeat):
    """Best time of each case, running the cases in turn ``repeat`` times."""
    best = {name: math.inf for name in cases}
    for _ in range(repeat):
        for name, fn in cases.items():
            start = time.perf_counter()
            fn()
            best[name] = min(best[name], time.perf_counter() - start)
    return best


def scene(size, rng=0):
    """Three waves of amplitudes 1, 2, 3 plus white noise of 0.5, float32, pixel 1 nm."""
    rng = np.random.default_rng(rng)
    q_px = 2 * np.pi * np.array([[0.11, 0.03], [-0.04, 0.1], [0.07, -0.09]])
    rows = np.arange(size, dtype=np.float64)[:, None]
    cols = np.arange(size, dtype=np.float64)[None, :]
    image = rng.normal(scale=0.5, size=(size, size)).astype(np.float32)
    for j, (qx, qy) in enumerate(q_px):
        image += ((1 + j) * np.cos(qx * cols + qy * rows + j)).astype(np.float32)
    return image, q_px


AMPLITUDES = (1.0, 2.0, 3.0)  # of the three waves of scene(): cos amplitude A0, so 2|A| = A0


def run(size=4096, sigma_px=8.0, repeat=3, textbook=True, padding_study=False):
    """Rows (case, ours s, reference s, target ratio) and accuracy notes for the lock-in kernel.

    Returns
    -------
    rows : list of (str, float, float, float or None)
        Case, our best time, the reference's best time, the target of ours / reference.
    checks : list of (str, float, float)
        Accuracy: what, the value, the largest acceptable value.
    notes : list of str
    """
    image, q_px = scene(size)
    step = max(1, int(round(sigma_px / 2)))
    kernel = lambda: domains.lockin(image, q_px, sigma_nm=sigma_px, pixel_size_nm=1.0)  # noqa: E731
    decimated = lambda: domains.lockin(image, q_px, sigma_nm=sigma_px, pixel_size_nm=1.0, step=step)  # noqa: E731
    times = interleaved_best(
        {
            "kernel": kernel,
            "floor": lambda: floor_fft(image, len(q_px)),
            "decimated": decimated,
            "decimated floor": lambda: decimated_floor(image, len(q_px), step),
            "rfft2": lambda: sfft.rfft2(image, workers=-1),
        },
        repeat,
    )
    what = f"3 q, {size}^2 float32, sigma {sigma_px:g} px"
    rows = [
        (f"lock-in kernel ({what}) vs full-resolution FFT floor (rfft2 + ifft2 per q)",
         times["kernel"], times["floor"], 1.5),
        (f"decimated lock-in (step {step}) vs one rfft2", times["decimated"], times["rfft2"], 2.0),
        (f"decimated lock-in (step {step}) vs decimated floor (rfft2 + ifft2 of (N/{step})^2 per q)",
         times["decimated"], times["decimated floor"], None),
    ]
    checks, notes = [], []
    full = kernel()
    coarse = decimated()
    sampled = full[:, ::step, ::step]
    scale = np.abs(sampled).max()
    checks.append((f"decimated (step {step}) vs full resolution at the sampled pixels, max |difference| / max |A|",
                   float(np.abs(coarse - sampled).max() / scale), 1e-5))
    if textbook:
        start = time.perf_counter()
        ref = textbook_lockin(image, q_px, sigma_px)
        rows.insert(0, (f"lock-in kernel ({what}) vs textbook real-space script (scipy.ndimage per q)",
                        times["kernel"], time.perf_counter() - start, 0.1))
        margin = int(math.ceil(6 * sigma_px))
        inner = (slice(None), slice(margin, -margin), slice(margin, -margin))
        a0 = np.asarray(AMPLITUDES)[:, None, None]
        err = np.abs(2 * np.abs(full) - 2 * np.abs(ref))[inner] / a0
        checks.insert(0, (f"amplitude vs textbook, >= {margin} px from the edges, max |2|A| - 2|A_ref|| / A0",
                          float(err.max()), 1e-3))
        coarse_ref = ref[:, ::step, ::step]
        cm = -(-margin // step)
        err = np.abs(2 * np.abs(coarse) - 2 * np.abs(coarse_ref))[:, cm:-cm, cm:-cm] / a0
        checks.insert(1, (f"decimated amplitude vs textbook at its pixels, same interior, max |difference| / A0",
                          float(err.max()), 1e-3))
        if padding_study:
            edge = np.ones(image.shape, bool)
            edge[margin:-margin, margin:-margin] = False
            for truncate in (0.0, 4.0, 6.0):
                old = _lockin.TRUNCATE
                _lockin.TRUNCATE = truncate
                try:
                    elapsed = interleaved_best({"k": kernel}, max(1, repeat - 1))["k"]
                    a = kernel()
                finally:
                    _lockin.TRUNCATE = old
                err = np.abs(2 * np.abs(a) - 2 * np.abs(ref))
                length = _lockin._fft_length(size, math.ceil(truncate * sigma_px), 1)
                notes.append(
                    f"zero padding {truncate:g} sigma (FFT length {length}): {elapsed:.3f} s, max |2|A| - textbook| "
                    f"interior {err[inner].max():.2e}, edge band {err[:, edge].max():.2e} (amplitudes 1, 2, 3)"
                )
    return rows, checks, notes


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, default=4096)
    parser.add_argument("--sigma-px", type=float, default=8.0)
    parser.add_argument("--repeat", type=int, default=3)
    parser.add_argument("--padding-study", action="store_true", help="also time and check 0, 4 and 6 sigma of padding")
    args = parser.parse_args()
    rows, checks, notes = run(args.size, args.sigma_px, args.repeat, padding_study=args.padding_study)
    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  {'ours (s)':>9}  {'ref (s)':>9}  {'ratio':>7}  target")
    for name, a, b, target in rows:
        print(f"{name:<{width}}  {a:9.3f}  {b:9.3f}  {a / b:7.3f}  {'' if target is None else f'<= {target:g}'}")
    for name, value, limit in checks:
        print(f"{name}: {value:.2e} (target <= {limit:g})")
    for note in notes:
        print(note)


if __name__ == "__main__":
    main()
