"""Glitched scan lines on scenes whose line-to-line variation is periodic structure, not noise.

A clean lattice, CDW or moiré imaged with little noise makes the line-to-line differences vary
from line to line by the structure itself (a line through a row of atoms sticks out of both
neighbouring lines, the line between does not). None of those lines is glitched; a line replaced
by garbage, or hit by spikes, still is.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from domains import Scan
from domains.level import level
from domains.synth import cdw_scene
from domains.synth.moire import twisted_bilayer

PIXEL_NM = 0.1  # resolves the Bragg peaks of a = 0.246 nm (below a sqrt(3) / 4)
SHAPE = (512, 512)
# (seed, twist in degrees, noise in clean-image standard deviations)
CLEAN_BILAYERS = [(0, 0.8, 0.05), (1, 1.1, 0.1), (2, 1.1, 0.3), (3, 1.5, 0.05), (4, 2.0, 0.2), (5, 1.3, 0.1)]


def _bilayer(seed, theta_deg, noise):
    image, _ = twisted_bilayer(shape=SHAPE, pixel_size_nm=PIXEL_NM, theta_deg=theta_deg, resolve_atoms=True,
                               noise=noise, rng=seed)
    return image


@pytest.mark.parametrize("seed, theta_deg, noise", CLEAN_BILAYERS)
def test_clean_resolved_bilayer_has_no_glitched_line(seed, theta_deg, noise):
    result = level(Scan(_bilayer(seed, theta_deg, noise), pixel_size_nm=PIXEL_NM), lines="difference", warn=False,
                   return_result=True)
    # analytic truth of the scene: every line is rendered from the same two-layer formula plus white noise,
    # so no line is glitched and no pixel is untrusted
    assert result.glitch_rows == ()
    assert not result.scan.mask.any() if result.scan.mask is not None else True


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_clean_cdw_scene_has_no_glitched_line(seed):
    scene = cdw_scene(shape=(256, 256), rng=seed, noise_nm=0.001)  # a quarter of the default noise
    result = level(scene.topography, lines="difference", warn=False, return_result=True)
    # analytic truth of the scene: lattice + CDW + plane + line offsets + white noise, no glitched line
    assert result.glitch_rows == ()


def _lattice(period_px, angle_deg, sharpness, noise, seed, n=256):
    """Hexagonal lattice (three cosines; exp(sharpness * sum / 3) sharpens the atoms), unit standard deviation."""
    rows, cols = np.mgrid[0:n, 0:n].astype(float)
    q = 4 * np.pi / (np.sqrt(3) * period_px)  # Bragg wavevector of a hexagonal lattice of constant period_px
    z = sum(np.cos(q * np.cos(a) * cols + q * np.sin(a) * rows)
            for a in np.deg2rad(angle_deg) + 2 * np.pi * np.arange(3) / 3)
    if sharpness:
        z = np.exp(sharpness * z / 3)
    z = (z - z.mean()) / z.std()
    return z + np.random.default_rng(seed).normal(0.0, noise, z.shape)


@pytest.mark.parametrize("period_px", [2.05, 2.2, 3.0, 3.5, 5.0, 8.0, 12.0, 20.0])
@pytest.mark.parametrize("angle_deg", [0.0, 3.0, 30.0])
def test_clean_lattice_any_period_and_orientation_has_no_glitched_line(period_px, angle_deg):
    # 0 and 30 degrees put lattice rows along the scan lines (the worst case: whole lines through atoms);
    # 2.05 px is just above the Nyquist limit, 20 px a period longer than the old 8-line window
    for sharpness, noise in ((0.0, 0.05), (2.0, 0.05), (2.0, 0.2)):
        image = _lattice(period_px, angle_deg, sharpness, noise, seed=int(10 * period_px))
        result = level(Scan(image, pixel_size_nm=0.05), lines="difference", warn=False, return_result=True)
        assert result.glitch_rows == (), (sharpness, noise)  # analytic truth: a periodic scene, no glitched line


# Rows built glitched in a clean bilayer: the first line garbage, two garbage lines in a row, a line with
# spikes on 10 % of its pixels, a line with a burst of noise, and the last line alternating. Each is ten
# times the corrugation (unit standard deviation): a tip that lost or regained feedback, or picked up
# charge noise, is off by far more than the corrugation (common practice, no source). Lines only as rough
# as the corrugation are not claimed: in a resolved bilayer every other line already sticks out of its
# neighbours by about the corrugation (docs/methods.md, levelling).
GLITCH_ROWS = (0, 97, 98, 200, 333, 511)
GLITCH_SCALE = 10.0


def _glitched_bilayer(seed, theta_deg=1.1, noise=0.1):
    image = _bilayer(seed, theta_deg, noise)
    rng = np.random.default_rng(100 + seed)
    m = image.shape[1]
    g = GLITCH_SCALE * image.std()
    image[0] = rng.normal(0.0, g, m)  # lost feedback: the line carries no image
    image[97] = rng.uniform(-np.sqrt(3) * g, np.sqrt(3) * g, m)  # standard deviation g
    image[98] = rng.uniform(-np.sqrt(3) * g, np.sqrt(3) * g, m)
    image[200, rng.random(m) < 0.1] += g  # tip spikes
    image[333] += rng.normal(0.0, g, m)  # a burst of noise
    image[511, ::2] += 2 * g  # a line alternating every pixel
    return image


@pytest.mark.parametrize("seed, theta_deg", [(0, 1.1), (1, 0.8), (2, 1.7)])
def test_glitches_in_a_low_noise_bilayer_found_exactly(seed, theta_deg):
    image = _glitched_bilayer(seed, theta_deg)
    result = level(Scan(image, pixel_size_nm=PIXEL_NM), lines="difference", warn=False, return_result=True)
    assert result.glitch_rows == GLITCH_ROWS  # analytic truth: exactly the lines built glitched
    expected = np.zeros(image.shape, bool)
    expected[list(GLITCH_ROWS)] = True
    assert_array_equal(result.scan.mask, expected)  # analytic truth: whole lines, nothing else


def test_lazy_bilayer_glitches_as_in_memory():
    import dask.array as da

    for image in (_bilayer(1, 1.1, 0.1), _glitched_bilayer(0)):
        eager = level(Scan(image, pixel_size_nm=PIXEL_NM), lines="difference", warn=False, return_result=True)
        lazy = level(Scan(da.from_array(image, chunks=(128, 512)), pixel_size_nm=PIXEL_NM), lines="difference",
                     warn=False, return_result=True)
        assert lazy.glitch_rows == eager.glitch_rows  # level's documented contract: decided exactly as in memory
