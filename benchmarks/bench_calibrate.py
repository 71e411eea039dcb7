"""Speed of the magnetometer calibration on a seeded synthetic pass, against baselines in this process.

Builds a pass of N magnetometer samples at 10 Hz (tilted-dipole field along a polar orbit, ~100 nT
unmodelled smooth field, a satellite turning at a few deg/s, coil currents switching every second,
30 nT noise), then times, best of REPEATS runs (the machine may be shared):

- baseline A: ``scipy.optimize.least_squares`` on the same 18-parameter residual with its default
  finite-difference Jacobian, started from the same linear first guess, no observability checks;
- recon's attitude-independent fit (``recon.calibrate.magfit.fit_magnetometer``): linear step, robust fit with
  the analytic Jacobian, observability screen, covariance with the unmodelled-field term;
- baseline B: an ordinary least-squares solve of the step-response design (``numpy.linalg.lstsq``);
- recon's step-response estimate (``recon.calibrate.steps.fit_crosstalk_steps``), which builds that design
  and adds the robust refit and the sandwich covariance;
- the same pass sampled "windowed" (the coils off at the sample on each one-second tick): baseline C,
  each coils-on sample less the following off sample turned by the gyro's rate, regressed on the
  current by ``numpy.linalg.lstsq``; and recon's synchronous estimate
  (``recon.calibrate.synchronous.fit_crosstalk_synchronous``: integrated gyro, two off windows, nuisance
  and gyro-scale columns, robust refit, sandwich covariance).

Prints seconds, samples/s and the ratio to each baseline, and the K error of each against the truth.

Usage: python benchmarks/bench_calibrate.py [N_SAMPLES]    (default 18,000: a 30-minute pass)
"""

from __future__ import annotations

import sys
import time

import numpy as np
from scipy.optimize import least_squares
from scipy.spatial.transform import Rotation

from recon.calibrate.linear import linear_calibration
from recon.calibrate.magfit import fit_magnetometer
from recon.calibrate.model import matrices_from_params, params_from_matrices, residual_nT
from recon.calibrate.steps import fit_crosstalk_steps
from recon.calibrate.synchronous import fit_crosstalk_synchronous

SEED = 20260714
REPEATS = 3
I_MAX_A = 0.12


def synthetic(n: int, seed: int = SEED):
    rng = np.random.default_rng(seed)
    dt = 0.1
    t = np.arange(n) * dt
    u = 2 * np.pi * t / 5700.0
    inc = np.radians(97.0)
    r_hat = np.stack([np.cos(u), np.sin(u) * np.cos(inc), np.sin(u) * np.sin(inc)], axis=1)
    dip = Rotation.from_rotvec(np.radians(10.0) * np.array([1.0, 0.3, 0.0])).apply([0.0, 0.0, -1.0])
    g = 24000.0 * (3.0 * (r_hat @ dip)[:, None] * r_hat - dip)
    extra = 100.0 / np.sqrt(1.5) * np.stack([np.sin(2 * np.pi * t / p) for p in (700.0, 1100.0, 900.0)], axis=1)
    w_mid = np.radians(4.0) * np.array([0.3, 0.5, 0.8]) + np.radians(3.0) * np.stack(
        [np.sin(t / 37), np.cos(t / 53), np.sin(t / 29 + 1)], axis=1)
    steps = Rotation.from_rotvec(-w_mid * dt)
    att = [Rotation.random(random_state=seed)]
    for k in range(n - 1):
        att.append(steps[k] * att[-1])
    b = Rotation.concatenate(att).apply(g + extra)
    i = (rng.choice([-1.0, 0.0, 1.0], size=(int(t[-1]) + 1, 3)) * I_MAX_A)[np.floor(t).astype(int)]
    s = np.eye(3) + 0.01 * np.array([[2.0, 0.5, -1.0], [0.5, -1.0, 0.3], [-1.0, 0.3, 1.5]])
    bias = np.array([400.0, -650.0, 220.0])
    k = 3.0 * np.array([[1800.0, -150.0, 90.0], [110.0, -1200.0, 260.0], [-70.0, 240.0, 2500.0]])
    noise = 30.0 * rng.standard_normal((n, 3))
    m = b @ s.T + bias + i @ k.T + noise
    off = np.isclose(t, np.round(t))  # windowed: the sample on each tick is taken with the coils off
    i_win = np.where(off[:, None], 0.0, i)
    m_win = b @ s.T + bias + i_win @ k.T + noise
    return t, m, np.linalg.norm(g, axis=1), i, t + 0.5 * dt, w_mid, k, (m_win, i_win, off)


def best_of(fn):
    best, out = np.inf, None
    for _ in range(REPEATS):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(n: int) -> None:
    t, m, h, i, tg, wg, k_true, (m_win, i_win, off) = synthetic(n)
    imax = np.full(3, I_MAX_A)
    print(f"synthetic pass: {n} samples at 10 Hz ({n / 600:.0f} min), seed {SEED}, best of {REPEATS}")

    def baseline_fit():
        lin = linear_calibration(m, h, i, sigma_nT=30.0)
        p0 = params_from_matrices(lin.bias_nT, lin.soft_iron, lin.crosstalk_nT_per_A)
        return least_squares(lambda p: residual_nT(p, m, h, i), p0, loss="soft_l1", f_scale=60.0).x

    def recon_fit():
        return fit_magnetometer(m, h, i, t_s=t, max_current_A=imax, noise_nT=30.0).params

    def k_err(p):
        return np.linalg.norm(matrices_from_params(p)[2] - k_true) / np.linalg.norm(k_true)

    ta, pa = best_of(baseline_fit)
    tb, pb = best_of(recon_fit)
    print(f"  baseline A (least_squares, finite differences): {ta:7.3f} s  {n / ta:10.0f} samples/s  "
          f"K error {100 * k_err(pa):.2f} %")
    print(f"  recon attitude-independent fit:                 {tb:7.3f} s  {n / tb:10.0f} samples/s  "
          f"K error {100 * k_err(pb):.2f} %  ratio {ta / tb:.3g} x baseline A")

    def recon_steps():
        return fit_crosstalk_steps(t, m, i, tg, wg, imax)

    def baseline_steps():
        d = m[1:] - Rotation.from_rotvec(-wg[:-1] * 0.1).apply(m[:-1])
        return np.linalg.lstsq(np.diff(i, axis=0), d, rcond=None)[0].T

    tc, kc = best_of(baseline_steps)
    td, sd = best_of(recon_steps)
    e_c = np.linalg.norm(kc - k_true) / np.linalg.norm(k_true)
    e_d = np.linalg.norm(sd.crosstalk_nT_per_A - k_true) / np.linalg.norm(k_true)
    print(f"  baseline B (plain step regression, no nuisances): {tc:7.3f} s  {n / tc:10.0f} samples/s  "
          f"K error {100 * e_c:.2f} %")
    print(f"  recon step-response estimate:                     {td:7.3f} s  {n / td:10.0f} samples/s  "
          f"K error {100 * e_d:.2f} %  ratio {tc / td:.3g} x baseline B")

    ticks = np.arange(0.0, np.floor(t[-1]) + 1.0)

    def baseline_sync():
        on = np.flatnonzero(~off)
        nxt = np.searchsorted(np.flatnonzero(off), on)
        keep = nxt < off.sum()
        on, b_idx = on[keep], np.flatnonzero(off)[nxt[keep]]
        w = wg[np.minimum(on, len(wg) - 1)]
        d = m_win[on] - Rotation.from_rotvec(-w * (t[on] - t[b_idx])[:, None]).apply(m_win[b_idx])
        return np.linalg.lstsq(i_win[on], d, rcond=None)[0].T

    def recon_sync():
        return fit_crosstalk_synchronous(t, m_win, i_win, off, ticks, tg, wg)

    te, ke = best_of(baseline_sync)
    tf, sf = best_of(recon_sync)
    e_e = np.linalg.norm(ke - k_true) / np.linalg.norm(k_true)
    e_f = np.linalg.norm(sf.crosstalk_nT_per_A - k_true) / np.linalg.norm(k_true)
    print(f"  baseline C (coils on less the next off sample):   {te:7.3f} s  {n / te:10.0f} samples/s  "
          f"K error {100 * e_e:.2f} %")
    print(f"  recon synchronous estimate:                       {tf:7.3f} s  {n / tf:10.0f} samples/s  "
          f"K error {100 * e_f:.2f} %  ratio {te / tf:.3g} x baseline C")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 18_000)
