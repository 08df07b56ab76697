"""Benchmark of the lock-in kernel on a large float32 image: ratios against reference runs in one process.

Cases (3 wavevectors, 4096^2 float32, sigma = 8 px by default):

- kernel vs the textbook real-space lock-in (I cos and I sin through scipy.ndimage.gaussian_filter
  per q, normalised by the filtered frame); target ratio <= 0.1;
- kernel vs the full-resolution floor (one rfft2 of the image plus one complex ifft2 per q);
  target <= 1.5;
- decimated kernel (step = sigma / 2) vs one rfft2; target <= 2;
- the zero padding of the FFT grid (none = periodic, 4 sigma, 6 sigma): time and the largest
  amplitude error against the textbook result, in the interior (>= 6 sigma from the edges) and in
  the edge band.

Timings interleave the cases and keep each one's best, so that a shared machine's load drifts
into all of them alike. Run alone with ``python benchmarks/lockin_kernel.py [--size N]``.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy import fft as sfft
from scipy import ndimage

import domains
from domains import _lockin


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


def run(size=4096, sigma_px=8.0, repeat=3, textbook=True):
    """Rows (case, ours s, reference s) and accuracy notes for the lock-in kernel."""
    image, q_px = scene(size)
    step = max(1, int(round(sigma_px / 2)))
    kernel = lambda: domains.lockin(image, q_px, sigma_nm=sigma_px, pixel_size_nm=1.0)  # noqa: E731
    decimated = lambda: domains.lockin(image, q_px, sigma_nm=sigma_px, pixel_size_nm=1.0, step=step)  # noqa: E731
    times = interleaved_best(
        {
            "kernel": kernel,
            "floor": lambda: floor_fft(image, len(q_px)),
            "decimated": decimated,
            "rfft2": lambda: sfft.rfft2(image, workers=-1),
        },
        repeat,
    )
    rows = [
        (f"lock-in kernel, 3 q, {size}^2 float32, sigma {sigma_px:g} px vs FFT floor (rfft2 + ifft2 per q)",
         times["kernel"], times["floor"]),
        (f"decimated lock-in (step {step}) vs one rfft2", times["decimated"], times["rfft2"]),
    ]
    notes = []
    if textbook:
        start = time.perf_counter()
        ref = textbook_lockin(image, q_px, sigma_px)
        rows.insert(0, ("lock-in kernel vs textbook real-space script (scipy.ndimage per q)",
                        times["kernel"], time.perf_counter() - start))
        margin = int(math.ceil(6 * sigma_px))
        inner = (slice(None), slice(margin, -margin), slice(margin, -margin))
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
            notes.append(
                f"zero padding {truncate:g} sigma (FFT length {_lockin._fft_length(size, math.ceil(truncate * sigma_px), 1)}): "
                f"{elapsed:.3f} s, max |2|A| - textbook| interior {err[inner].max():.2e}, edge band {err[:, edge].max():.2e} "
                f"(amplitudes 1, 2, 3)"
            )
        full = kernel()
        coarse = decimated()
        sampled = full[:, ::step, ::step]
        notes.append(f"decimated vs full resolution at the sampled pixels: max |difference| "
                     f"{np.abs(coarse - sampled).max():.2e}")
    return rows, notes


def main():
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--size", type=int, default=4096)
    parser.add_argument("--sigma-px", type=float, default=8.0)
    parser.add_argument("--repeat", type=int, default=3)
    args = parser.parse_args()
    rows, notes = run(args.size, args.sigma_px, args.repeat)
    width = max(len(r[0]) for r in rows)
    print(f"{'case':<{width}}  {'ours (s)':>9}  {'ref (s)':>9}  {'ratio':>7}")
    for name, a, b in rows:
        print(f"{name:<{width}}  {a:9.3f}  {b:9.3f}  {a / b:7.3f}")
    for note in notes:
        print(note)


if __name__ == "__main__":
    main()
