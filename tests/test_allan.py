"""Overlapping Allan deviation against allantools and against the white-noise law, and the noise
terms read from it (IEEE Std 952-1997 annex C)."""

from __future__ import annotations

import allantools
import numpy as np
import pytest

from recon.core import white_noise_from_differences
from recon.estimate.noise import gyro_noise_from_adev, overlapping_adev

FS_HZ = 10.0


def test_matches_allantools_oadev():
    """Same overlapping estimator as allantools.oadev(data_type="freq", taus="octave"), to round-off."""
    rng = np.random.default_rng(0)
    rate = 0.01 * np.sqrt(FS_HZ) * rng.normal(size=20_000) + 1e-4 * np.cumsum(rng.normal(size=20_000)) / FS_HZ
    taus_ref, adev_ref, _, n_ref = allantools.oadev(rate, rate=FS_HZ, data_type="freq", taus="octave")
    taus, adev, n = overlapping_adev(rate, FS_HZ)
    common, i, j = np.intersect1d(np.round(taus, 9), np.round(taus_ref, 9), return_indices=True)
    assert len(common) >= 10
    # float64 sums of 2e4 terms: relative round-off ~1e-12; 1e-9 leaves room for summation order
    assert np.max(np.abs(adev[i] / adev_ref[j] - 1.0)) < 1e-9
    assert np.array_equal(n[i], n_ref[j].astype(int))


def test_white_rate_noise_check_value():
    """White rate noise with N = 0.01 deg/sqrt(s) at 10 Hz gives sigma(0.8 s) = N / sqrt(0.8) = 0.0111
    (computed, sigma^2 = N^2 / tau for white rate noise, IEEE Std 952-1997 annex C)."""
    rng = np.random.default_rng(1)
    n_arw = 0.01  # deg/sqrt(s)
    rate = n_arw * np.sqrt(FS_HZ) * rng.normal(size=360_000)  # 10 h at 10 Hz, deg/s
    taus, adev, terms = overlapping_adev(rate, FS_HZ, m=np.array([8]))
    assert taus[0] == pytest.approx(0.8)
    # relative 1-sigma of the overlapping estimate ~ 1/sqrt(terms / m) = 0.5 %: allow 3 % (6 sigma)
    assert adev[0] == pytest.approx(0.0111, rel=0.03)
    assert adev[0] == pytest.approx(n_arw / np.sqrt(0.8), rel=0.03)


def test_noise_terms_recovered_from_a_synthetic_gyro():
    """ARW N and rate random walk K put in are read back: N within 5 %, K within 30 % (K rests on
    few long-tau points), and the bias instability is the curve's minimum over 0.664."""
    rng = np.random.default_rng(2)
    n_arw, k_rrw = 0.004, 0.0005  # deg/sqrt(s), deg/s/sqrt(s)
    dt = 1.0 / FS_HZ
    m = 200_000
    rate = n_arw / np.sqrt(dt) * rng.normal(size=m) + np.cumsum(k_rrw * np.sqrt(dt) * rng.normal(size=m))
    taus, adev, _ = overlapping_adev(rate, FS_HZ)
    fig = gyro_noise_from_adev(taus, adev)
    assert fig.arw == pytest.approx(n_arw, rel=0.05)
    assert fig.rrw == pytest.approx(k_rrw, rel=0.3)
    assert fig.bias_instability == pytest.approx(adev.min() / 0.664)


def test_multi_column_and_short_input():
    rng = np.random.default_rng(3)
    x = rng.normal(size=(1000, 3))
    taus, adev, _ = overlapping_adev(x, 1.0)
    for c in range(3):
        _, a1, _ = overlapping_adev(x[:, c], 1.0)
        assert np.allclose(adev[:, c], a1, rtol=1e-14)
    taus, adev, n = overlapping_adev(np.ones(3), 1.0)
    assert np.all(n >= 1) and np.all(adev == 0.0)


def test_white_noise_from_second_differences():
    """A smooth signal plus white noise of sigma 100 gives back 100 within 2 % (2e4 samples:
    MAD-based spread has relative sigma ~ 1.1 / sqrt(N) = 0.8 %)."""
    rng = np.random.default_rng(4)
    t = np.arange(20_000) * 0.1
    smooth = 30_000 * np.sin(2 * np.pi * t / 600.0)
    x = np.c_[smooth, -smooth, 0.5 * smooth] + 100.0 * rng.normal(size=(len(t), 3))
    assert white_noise_from_differences(x) == pytest.approx(100.0, rel=0.02)
