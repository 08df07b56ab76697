"""Drift correction (Lawler–Fujita) on a twisted bilayer whose atoms are resolved: it must not take the moiré for drift.

Scenes come from ``domains.synth.moire.twisted_bilayer(resolve_atoms=True)``, which renders the two layers'
atomic lattices from their own phases (and, for a drifted scan, at the displaced sampling points
r + u(r)) and adds white noise; nothing of the analysis makes the image. The truth is the scene's
input: its twist, and the displacement u(r) it was rendered with. The other layer's Bragg peaks sit a
moiré wavevector away, |K| = 2|G| sin(θ/2) (K. Hermann, J. Phys.: Condens. Matter 24, 314210 (2012)),
with |G| = 4π / (√3 a) for a hexagonal lattice of constant a. Below θ ≈ 1.15° that is less than 2 % of
|G|, the regime where the drift width used to treat the other layer's peak as the Bragg peak itself.
"""

import math

import numpy as np
import pytest

from domains._scan import Scan
from domains.pipeline import Config, analyze
from domains.synth.moire import twisted_bilayer

A_NM = 0.246  # lattice constant of the invented layers (graphene's, from memory)
PX = 0.1  # nm: resolves the Bragg peaks (|G| = 29.5 rad/nm below Nyquist pi / 0.1 = 31.4 rad/nm)
N = 512  # 51 nm frame: four moiré periods at 1.1 deg


def moire_k(theta_deg):
    # Hermann (2012): |K| = 2 |G| sin(theta / 2), |G| = 4 pi / (sqrt 3 a)
    return 2 * 4 * np.pi / (np.sqrt(3) * A_NM) * np.sin(np.radians(theta_deg) / 2)


def run(theta_deg, seed, displacement=None):
    image, _ = twisted_bilayer(shape=(N, N), pixel_size_nm=PX, a_nm=A_NM, theta_deg=theta_deg, resolve_atoms=True,
                               noise=1.0, rng=seed, displacement_nm=displacement)
    return analyze(Scan(image, pixel_size_nm=PX, channel="topography"), config=Config(), progress=False)


def _drift_keeps_the_other_layer_out(result, theta_deg):
    drift = result.choices["drift"]
    assert drift["sigma_nm"] is not None  # the frame holds the width: the drift is corrected
    # The lock-in at one layer's Bragg peak passes the other layer's, |K| away, with weight
    # exp(-sigma^2 |K|^2 / 2) (Gaussian lock-in, docs/methods.md §1); the run's leakage allowance is 1 %.
    # The width comes from the measured |K| (a difference of two lock-in-refined Bragg vectors); 1 % of |K|
    # (1/20 of a frequency bin of this frame) covers its error, so sigma |K| >= 0.99 sqrt(2 ln 100).
    assert drift["sigma_nm"] * moire_k(theta_deg) >= 0.99 * math.sqrt(2 * math.log(100))


@pytest.mark.slow
def test_drift_on_a_driftless_resolved_bilayer_leaves_the_twist_within_two_sigma_over_10_seeds():
    # Ten noise realisations at 1.1 and 1.12 deg (below the 1.15 deg where the other layer's Bragg peak
    # fell inside the old 2 % window; not lower, so that the 51 nm frame keeps a 3 x 3 grid of moiré
    # lock-in samples inside its trusted part): the full run with its default drift correction must report
    # the scene's twist within two of its own standard errors in 90-100 % of them (95.45 % for a
    # calibrated normal error, derived; issue 12), and remove no drift that is not there.
    inside, z = [], []
    for seed in range(10):
        theta = (1.1, 1.12)[seed % 2]
        result = run(theta, seed)
        _drift_keeps_the_other_layer_out(result, theta)
        # No drift in the scene: what is removed is noise, far below a lattice constant. A drift field that
        # carries the moiré jumps by about a/2 where the layers' summed Bragg phase slips (AB/BA stacking)
        # [derived; measured 0.3-0.46 nm with the old width]; a/10 separates the two.
        assert result.summary["drift"]["max_displacement_nm"] < A_NM / 10
        moire = result.summary["moire"]
        assert moire["mode"] == "atomic"
        err = moire["twist_deg_err"]  # None would mean a uniform twist reported as varying: a miss
        z.append(math.inf if err is None else (moire["twist_deg"] - theta) / err)
        inside.append(err is not None and abs(moire["twist_deg"] - theta) <= 2 * err)
    assert 0.9 <= np.mean(inside) <= 1.0, z  # issue 12: 90-100 % within 2 reported sigma


@pytest.mark.slow
def test_a_drifted_resolved_bilayer_is_corrected_and_keeps_its_twist():
    # A scan displacement u = (0.075 sin(2 pi x / L), 0.15 sin(2 pi y / L)) nm over the L = 51 nm frame
    # (a stretch of the slow axis of up to 1.8 %, much more than the twist's 0.4 % error), 1.1 deg.
    theta, amplitude = 1.1, 0.15
    length = N * PX
    y, x = np.mgrid[:N, :N] * PX
    u = np.stack([0.5 * amplitude * np.sin(2 * np.pi * x / length), amplitude * np.sin(2 * np.pi * y / length)])
    result = run(theta, 0, displacement=u)
    _drift_keeps_the_other_layer_out(result, theta)
    # The removed displacement is the scene's (Lawler-Fujita: T(r) = f(r + u(r)), docs/methods.md §2), up to
    # an affine part (the correction imposes the measured mean Bragg vectors) and the lock-in's smoothing:
    # a sinusoid of wavelength L keeps exp(-(2 pi sigma / L)^2 / 2) of its amplitude in one pass [derived].
    (ux, attrs), (uy, _) = result.maps["displacement/ux"], result.maps["displacement/uy"]
    step = attrs["pixel_size_nm"]
    rows, cols = np.mgrid[:ux.shape[0], :ux.shape[1]]
    yy, xx = rows * step[0], cols * step[1]
    interior = (np.minimum(yy, xx) > 0.2 * length) & (np.maximum(yy, xx) < 0.8 * length)  # away from the edges
    sigma = result.choices["drift"]["sigma_nm"]
    lost = 1 - math.exp(-0.5 * (2 * np.pi * sigma / length) ** 2)
    fit = np.c_[np.ones(interior.sum()), xx[interior], yy[interior]]
    for found, true, amp in ((ux, 0.5 * amplitude * np.sin(2 * np.pi * xx / length), 0.5 * amplitude),
                             (uy, amplitude * np.sin(2 * np.pi * yy / length), amplitude)):
        diff = (found - true)[interior]
        diff = diff - fit @ np.linalg.lstsq(fit, diff, rcond=None)[0]
        assert np.max(np.abs(diff)) <= lost * amp  # derived, see above
    moire = result.summary["moire"]
    # The twist after the correction: the scene's, within two reported standard errors (one scene: a
    # 95 % check, covered over seeds by the test above).
    assert abs(moire["twist_deg"] - theta) <= 2 * moire["twist_deg_err"]


def test_drift_is_left_alone_where_the_frame_cannot_keep_the_other_layer_out():
    # A strip of 200 x 768 pixels of 0.09 nm (18 x 69 nm) at 1.5 deg: the drift width is capped at 0.2 of the
    # short side, 3.6 nm, where the other layer's Bragg peak, |K| = 0.77 rad/nm away (Hermann 2012), still
    # leaks exp(-(3.6 |K|)^2 / 2) = 2 % > the 1 % allowance [derived]: drift cannot be told from the moiré.
    px, theta = 0.09, 1.5
    image, _ = twisted_bilayer(shape=(200, 768), pixel_size_nm=px, a_nm=A_NM, theta_deg=theta, resolve_atoms=True,
                               noise=1.0, rng=0)
    short = 200 * px
    assert math.exp(-0.5 * (0.2 * short * moire_k(theta)) ** 2) > 0.01  # the premise, derived above
    result = analyze(Scan(image, pixel_size_nm=px, channel="topography"), config=Config(), progress=False)
    assert result.choices["drift"]["corrected"] is False and result.choices["drift"]["sigma_nm"] is None
    assert result.summary["drift"] is None  # nothing removed
    assert any(n.startswith("Drift was not corrected") for n in result.notes)
    # The two layers were read (the premise of the decision): the twist from their Bragg peaks is the scene's
    # within 5 %, a loose bound for a frame 18 nm across (|K| is only 2.2 frequency bins along y there).
    assert abs(result.summary["moire"]["from_bragg_peaks"]["twist_deg"] - theta) < 0.05 * theta
