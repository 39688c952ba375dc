"""Tests of the Recording's own views."""

from __future__ import annotations

from pathlib import Path

import fitdyn

DEMO = Path(__file__).resolve().parents[1] / "data_demo"


def test_recording_repr_is_one_short_line():
    rec = fitdyn.read(DEMO / "torsion_rig.csv")
    r = repr(rec)
    assert r == (
        f"<Recording {rec.source}: angle [rad], rate [rad/s]; 250 samples in 5 "
        "trajectories, 0 gap(s); time unit s>"
    )
    assert str(rec) == rec.summary()  # the long form is still there
