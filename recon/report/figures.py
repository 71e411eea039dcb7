"""Figures for the pass report, drawn with matplotlib's Agg backend into PNG bytes (no windows).

Each function takes plain arrays (times as datetime64[ns] UTC) and returns a :class:`recon.report.Figure`.
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from .html import Figure  # noqa: E402

__all__ = ["quality_timeline", "field_magnitude", "attitude_uncertainty", "rates", "gyro_bias",
           "commands", "kinetic_energy", "ground_track"]

_AX_COLOURS = ("#1f5fa8", "#c0561b", "#3d8a3d")
_AXES = ("x", "y", "z")


def _minutes(t: np.ndarray, t0: np.datetime64) -> np.ndarray:
    return (np.asarray(t, "datetime64[ns]") - t0).astype(np.int64) / 60e9


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight", metadata={"Software": None})
    plt.close(fig)
    return buf.getvalue()


def _new(nrows: int = 1, height: float = 2.6):
    fig, ax = plt.subplots(nrows, 1, figsize=(9, height * nrows), sharex=True, squeeze=False)
    return fig, ax[:, 0]


def quality_timeline(t0: np.datetime64, logs: Mapping[str, np.ndarray],
                     gaps: Mapping[str, Sequence[tuple[np.datetime64, np.datetime64]]],
                     dropped: Mapping[str, np.ndarray], saturated: Mapping[str, np.ndarray]) -> Figure:
    """One lane per log: kept samples (grey ticks), gaps (red spans), dropped lines (x), saturation (^)."""
    fig, (ax,) = _new(1, 0.6 + 0.55 * max(len(logs), 1))
    names = list(logs)
    for k, name in enumerate(names):
        t = _minutes(logs[name], t0)
        if t.size:
            ax.plot(t, np.full(t.size, k), "|", color="#999999", ms=6, alpha=0.4)
        for a, b in gaps.get(name, ()):
            ax.axvspan(*_minutes(np.array([a, b]), t0), ymin=(k + 0.1) / len(names), ymax=(k + 0.9) / len(names),
                       color="#c03030", alpha=0.35)
        d = dropped.get(name)
        if d is not None and len(d):
            ax.plot(_minutes(d, t0), np.full(len(d), k + 0.25), "x", color="#9b1c1c", ms=5)
        s = saturated.get(name)
        if s is not None and len(s):
            ax.plot(_minutes(s, t0), np.full(len(s), k - 0.25), "^", color="#8a5a00", ms=4)
    ax.set_yticks(range(len(names)), names)
    ax.set_ylim(-0.6, len(names) - 0.4)
    ax.set_xlabel(f"minutes since {np.datetime_as_string(t0, 's')} UTC")
    return Figure("quality_timeline", "quality",
                  "Samples kept (grey), gaps (red spans), dropped lines (x) and saturated samples (triangles).",
                  _png(fig))


def field_magnitude(t: np.ndarray, b_ref_nT: np.ndarray, b_before_nT: np.ndarray,
                    b_after_nT: np.ndarray) -> Figure:
    """|b| of the reference field, and of the magnetometer before and after calibration."""
    fig, (ax, ax2) = _new(2, 2.4)
    m = _minutes(t, t[0])
    ref = np.linalg.norm(b_ref_nT, axis=1)
    ax.plot(m, np.linalg.norm(b_before_nT, axis=1), ".", ms=1.5, color="#c0561b", label="measured, raw")
    ax.plot(m, np.linalg.norm(b_after_nT, axis=1), ".", ms=1.5, color="#1f5fa8", label="calibrated")
    ax.plot(m, ref, "-", color="k", lw=1, label="IGRF-14 along the orbit")
    ax.set_ylabel("|b| (nT)")
    ax.legend(loc="best", fontsize=8, markerscale=6)
    ax2.plot(m, np.linalg.norm(b_before_nT, axis=1) - ref, ".", ms=1.5, color="#c0561b")
    ax2.plot(m, np.linalg.norm(b_after_nT, axis=1) - ref, ".", ms=1.5, color="#1f5fa8")
    ax2.set_ylabel("|b| - |b_ref| (nT)")
    ax2.set_xlabel(f"minutes since {np.datetime_as_string(t[0], 's')} UTC")
    return Figure("field_magnitude", "magnetometer",
                  "Field magnitude against the reference field, before (orange) and after (blue) calibration.",
                  _png(fig))


def _bands(t, value, sigma, ylabel, name, section, caption, scale=1.0) -> Figure:
    fig, axs = _new(3, 1.7)
    m = _minutes(t, t[0])
    for k, ax in enumerate(axs):
        v = value[:, k] * scale
        ax.plot(m, v, "-", lw=0.8, color=_AX_COLOURS[k])
        if sigma is not None:
            s3 = 3 * sigma[:, k] * scale
            ax.fill_between(m, v - s3, v + s3, color=_AX_COLOURS[k], alpha=0.2, lw=0)
        ax.set_ylabel(f"{_AXES[k]} {ylabel}", fontsize=8)
    axs[-1].set_xlabel(f"minutes since {np.datetime_as_string(t[0], 's')} UTC")
    return Figure(name, section, caption, _png(fig))


def attitude_uncertainty(t: np.ndarray, sigma_att_rad: np.ndarray) -> Figure:
    """3-sigma attitude uncertainty per body axis (deg)."""
    fig, (ax,) = _new(1, 2.6)
    m = _minutes(t, t[0])
    for k in range(3):
        ax.semilogy(m, 3 * np.degrees(sigma_att_rad[:, k]), color=_AX_COLOURS[k], lw=1, label=f"about {_AXES[k]}")
    ax.set_ylabel("3-sigma attitude (deg)")
    ax.legend(fontsize=8)
    ax.set_xlabel(f"minutes since {np.datetime_as_string(t[0], 's')} UTC")
    return Figure("attitude_uncertainty", "attitude", "3-sigma attitude uncertainty about each body axis.",
                  _png(fig))


def rates(t: np.ndarray, w_rad_s: np.ndarray, sigma_w_rad_s: np.ndarray | None) -> Figure:
    return _bands(t, w_rad_s, sigma_w_rad_s, "rate (deg/s)", "body_rate", "attitude",
                  "Body rate with 3-sigma band.", scale=180.0 / np.pi)


def gyro_bias(t: np.ndarray, bias_rad_s: np.ndarray, sigma_rad_s: np.ndarray | None) -> Figure:
    return _bands(t, bias_rad_s, sigma_rad_s, "bias (deg/s)", "gyro_bias", "attitude",
                  "Estimated gyro bias with 3-sigma band.", scale=180.0 / np.pi)


def commands(t_logged: np.ndarray, i_logged_A: np.ndarray, t_replay: np.ndarray, i_replay_A: np.ndarray) -> Figure:
    """Logged coil currents against the control law replayed from the telemetry."""
    fig, axs = _new(3, 1.7)
    t0 = t_logged[0] if len(t_logged) else t_replay[0]
    for k, ax in enumerate(axs):
        ax.step(_minutes(t_logged, t0), 1e3 * i_logged_A[:, k], where="post", lw=0.8, color=_AX_COLOURS[k],
                label="logged")
        ax.step(_minutes(t_replay, t0), 1e3 * i_replay_A[:, k], where="post", lw=0.8, color="k", alpha=0.6,
                ls="--", label="replayed")
        ax.set_ylabel(f"coil {_AXES[k]} (mA)", fontsize=8)
    axs[0].legend(fontsize=8)
    axs[-1].set_xlabel(f"minutes since {np.datetime_as_string(t0, 's')} UTC")
    return Figure("commands", "controller", "Logged coil currents (colour) and the replayed control law (dashed).",
                  _png(fig))


def kinetic_energy(t: np.ndarray, energy_J: np.ndarray) -> Figure:
    fig, (ax,) = _new(1, 2.4)
    ax.semilogy(_minutes(t, t[0]), energy_J, color="#1f5fa8", lw=1)
    ax.set_ylabel("rotational kinetic energy (J)")
    ax.set_xlabel(f"minutes since {np.datetime_as_string(t[0], 's')} UTC")
    return Figure("kinetic_energy", "controller", "Rotational kinetic energy from the reconstructed rate.",
                  _png(fig))


def ground_track(lat_deg: np.ndarray, lon_deg: np.ndarray,
                 marks: Sequence[tuple[float, float, str]] = ()) -> Figure:
    """Sub-satellite track (no coastlines: none are shipped) with anomaly start points marked."""
    fig, (ax,) = _new(1, 3.6)
    lon = np.asarray(lon_deg, float).copy()
    lon[np.abs(np.diff(lon, prepend=lon[:1])) > 180] = np.nan  # break the line at the date line
    ax.plot(lon, lat_deg, "-", color="#1f5fa8", lw=1)
    ax.plot(lon_deg[:1], lat_deg[:1], "o", color="#1f5fa8", ms=5)
    for la, lo, label in marks:
        ax.plot(lo, la, "D", color="#9b1c1c", ms=5)
        ax.annotate(label, (lo, la), fontsize=7, xytext=(3, 3), textcoords="offset points")
    ax.set_xlim(-180, 180)
    ax.set_ylim(-90, 90)
    ax.set_xlabel("longitude (deg)")
    ax.set_ylabel("latitude (deg)")
    ax.grid(True, lw=0.3)
    return Figure("ground_track", "track", "Ground track (dot: start) with anomaly start points (diamonds).",
                  _png(fig))
