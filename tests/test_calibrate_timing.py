"""The magnetometer's time-tag offset from the replayed control law (recon.calibrate.timing).

Truth: the simulator stamps every magnetometer sample ``true instant + offset`` (truth.json
"magnetometer"/"time_offset_s"); the onboard law used the sample taken at each tick. The replay must
find the offset to the stamps' resolution, on B-dot and on the cross-product law, and say
"undetermined" (with the reason) when it cannot tell.
"""

import dataclasses

import numpy as np
import pytest

from recon.calibrate import mag_time_offset
from recon.clean import clean_pass
from recon.config import load_mission
from recon.load import load_pass
from recon.simulate import Imperfections, simulate_pass

# the file writes stamps in whole ms, and the simulator's offset is drawn in whole ms
STAMP_TOL_S = 1e-6


def _pass(tmp_path, regime="detumble", seed=1, duration_s=600.0, **kw):
    sim = simulate_pass(regime, seed=seed, out_dir=tmp_path, duration_s=duration_s, **kw)
    m = load_mission(tmp_path / "mission.toml")
    return sim, m, clean_pass(load_pass(m), m)


@pytest.mark.parametrize("regime, seed", [("detumble", 8), ("detumble", 21), ("momentum_orbit", 3)])
def test_offset_found_from_the_replay(tmp_path, regime, seed):
    sim, m, c = _pass(tmp_path, regime, seed)
    truth = sim.truth["magnetometer"]["time_offset_s"]
    assert truth != 0.0
    off = mag_time_offset(m, c)
    assert off.determined and off.method == "command replay"
    assert off.offset_s == pytest.approx(truth, abs=STAMP_TOL_S)
    assert off.matched >= 0.95 * off.informative and off.runner_up_matched < 0.2 * off.informative
    assert off.significant == (abs(truth) >= 0.01)


def test_no_offset_on_ideal_stamps(tmp_path):
    sim, m, c = _pass(tmp_path, "detumble", 5, imperfections=Imperfections().only("inertia"))
    off = mag_time_offset(m, c)
    assert off.offset_s == pytest.approx(0.0, abs=STAMP_TOL_S)
    assert not off.significant and off.anomaly(None, None) is None


def test_undetermined_without_the_tick_instants(tmp_path):
    _, m, c = _pass(tmp_path, "detumble", 2, duration_s=300.0)
    m = dataclasses.replace(m, controller=dataclasses.replace(m.controller, first_tick=None))
    off = mag_time_offset(m, c)
    assert not off.determined and "first_tick" in off.reason


def test_undetermined_when_the_commands_do_not_follow_the_law(tmp_path):
    """A gain the flight software does not use: no candidate reproduces the commands."""
    _, m, c = _pass(tmp_path, "detumble", 4, duration_s=300.0)
    m = dataclasses.replace(m, controller=dataclasses.replace(m.controller, gain=m.controller.gain * 1.3))
    off = mag_time_offset(m, c)
    assert not off.determined and "do not follow" in off.reason


def test_undetermined_without_a_law(tmp_path):
    _, m, c = _pass(tmp_path, "quiet", 1, duration_s=120.0)
    assert not mag_time_offset(m, c).determined


def test_significant_offset_is_reported_with_its_figures(tmp_path):
    sim, m, c = _pass(tmp_path, "detumble", 8, duration_s=300.0)
    off = mag_time_offset(m, c)
    a = off.anomaly(np.datetime64("2026-07-14T09:12:00", "ns"), np.datetime64("2026-07-14T09:17:00", "ns"))
    assert a is not None and a.code == "mag_time_offset" and a.severity == "warning"
    assert f"{abs(sim.truth['magnetometer']['time_offset_s']):.3f}" in a.evidence
