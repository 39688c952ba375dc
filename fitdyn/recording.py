"""The cleaned recording and the log that accounts for every input row.

A :class:`Recording` is what the importer hands to every estimator: sorted samples of
two channels, grouped in independent trajectories, with gap-free *segments* inside
each trajectory (estimators that pair consecutive samples never pair across a
segment boundary).  A :class:`CleaningLog` says, for every input row, whether it was
kept, dropped (and why), merged into another row, or kept but flagged.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

import numpy as np

__all__ = ["RowFate", "CleaningLog", "Recording", "describe_sampling"]

#: Status words used in the cleaning log.
KEPT = "kept"
DROPPED = "dropped"
MERGED = "merged"


@dataclass(frozen=True)
class RowFate:
    """What happened to one input row.

    Attributes
    ----------
    row : int
        The row's line number in the file (1-based, counting the header and comment
        lines) or its index label in a DataFrame / position in an array.
    status : str
        ``"kept"``, ``"dropped"`` or ``"merged"`` (averaged into another row that
        repeats its timestamp; the first such row stays ``"kept"``).
    reason : str or None
        Why a row was dropped or merged (e.g. ``"missing value"``,
        ``"duplicate row"``, ``"repeated timestamp"``); ``None`` when kept.
    flags : tuple of str
        Marks on a kept row, e.g. ``("outlier",)``.
    """

    row: int
    status: str
    reason: str | None = None
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class CleaningLog:
    """Accounting of every input row.

    The identity ``kept + dropped + merged == input_rows`` always holds.

    Attributes
    ----------
    source : str or None
        File name or a description of the in-memory source.
    fates : tuple of RowFate
        One entry per input row, in input order.
    notes : tuple of str
        Free-text remarks on the cleaning (options used, gaps found...).
    """

    source: str | None
    fates: tuple[RowFate, ...]
    notes: tuple[str, ...] = ()

    # -- counts ---------------------------------------------------------------
    @cached_property
    def _tally(self) -> tuple[Counter, Counter, Counter]:
        status = Counter(f.status for f in self.fates)
        dropped = Counter(f.reason for f in self.fates if f.status == DROPPED)
        flags = Counter(fl for f in self.fates for fl in f.flags)
        return status, dropped, flags

    @property
    def input_rows(self) -> int:
        """Number of input data rows."""
        return len(self.fates)

    @property
    def kept_rows(self) -> int:
        """Rows that became samples of the recording."""
        return self._tally[0][KEPT]

    @property
    def merged_rows(self) -> int:
        """Rows averaged into another row with the same timestamp."""
        return self._tally[0][MERGED]

    @property
    def dropped_rows(self) -> int:
        """Rows dropped for any reason."""
        return self._tally[0][DROPPED]

    def dropped(self) -> dict[str, int]:
        """Counts of dropped rows by reason."""
        return dict(self._tally[1])

    def flagged(self) -> dict[str, int]:
        """Counts of flags on kept rows (e.g. ``{"outlier": 3}``)."""
        return dict(self._tally[2])

    def outliers(self) -> int:
        """Rows found to be outliers: flagged and kept, or dropped as outliers."""
        return self._tally[2]["outlier"] + self._tally[1]["outlier"]

    def rows_with(self, status: str, reason: str | None = None) -> list[int]:
        """Row numbers with a given status (and reason, when given)."""
        return [
            f.row
            for f in self.fates
            if f.status == status and (reason is None or f.reason == reason)
        ]

    def balanced(self) -> bool:
        """Whether kept + dropped + merged equals the number of input rows."""
        return self.kept_rows + self.dropped_rows + self.merged_rows == self.input_rows

    # -- output ---------------------------------------------------------------
    def to_dict(self, rows: bool = False) -> dict[str, Any]:
        """Machine-readable counts (and, with ``rows=True``, every row's fate)."""
        out: dict[str, Any] = {
            "source": self.source,
            "input_rows": self.input_rows,
            "kept_rows": self.kept_rows,
            "dropped_rows": self.dropped_rows,
            "dropped": self.dropped(),
            "merged_rows": self.merged_rows,
            "outliers": self.outliers(),
            "flags": self.flagged(),
            "notes": list(self.notes),
        }
        if rows:
            out["rows"] = [
                {"row": f.row, "status": f.status, "reason": f.reason, "flags": list(f.flags)}
                for f in self.fates
            ]
        return out

    def summary(self) -> str:
        """A few printable lines."""
        lines = [
            f"input rows      {self.input_rows}",
            f"kept            {self.kept_rows}",
            f"merged away     {self.merged_rows}",
            f"dropped         {self.dropped_rows}",
        ]
        for reason, n in sorted(self.dropped().items()):
            lines.append(f"  - {reason}: {n}")
        for flag, n in sorted(self.flagged().items()):
            lines.append(f"flagged {flag:<8}{n} (kept)")
        for note in self.notes:
            lines.append(f"note: {note}")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()


def describe_sampling(
    times: np.ndarray, trajectory: np.ndarray, jitter_tolerance: float = 0.01
) -> dict[str, Any]:
    """Describe the sampling grid of sorted times grouped by trajectory.

    Parameters
    ----------
    times : ndarray, shape (n,)
        Sample times, increasing within each trajectory.
    trajectory : ndarray of int, shape (n,)
        Trajectory code of each sample (samples of one trajectory are contiguous).
    jitter_tolerance : float
        Largest relative deviation of a step from the median step for the grid to
        count as uniform (gaps excluded).

    Returns
    -------
    dict
        ``uniform`` (bool), ``median_step``, ``min_step``, ``max_step`` and
        ``jitter`` (largest relative deviation of a within-trajectory step from the
        median step), ``steps`` (number of steps), ``on_grid`` (every step is a
        whole multiple of the median step within the tolerance: a uniform grid,
        possibly with missing samples) and ``missing_on_grid`` (how many grid points
        those longer steps skip).
    """
    times = np.asarray(times, dtype=float)
    trajectory = np.asarray(trajectory)
    same = trajectory[1:] == trajectory[:-1]
    steps = np.diff(times)[same]
    if steps.size == 0:
        return {
            "uniform": False,
            "median_step": float("nan"),
            "min_step": float("nan"),
            "max_step": float("nan"),
            "jitter": float("nan"),
            "steps": 0,
            "on_grid": False,
            "missing_on_grid": 0,
        }
    med = float(np.median(steps))
    jitter = float(np.max(np.abs(steps - med)) / med) if med > 0 else float("inf")
    holes = 0
    on_grid = False
    if med > 0:
        ratio = steps / med
        whole = np.maximum(np.round(ratio), 1.0)
        on_grid = bool(np.all(np.abs(ratio - whole) <= jitter_tolerance * whole))
        holes = int(np.sum(whole - 1)) if on_grid else 0
    return {
        "uniform": bool(jitter <= jitter_tolerance),
        "median_step": med,
        "min_step": float(steps.min()),
        "max_step": float(steps.max()),
        "jitter": jitter,
        "steps": int(steps.size),
        "on_grid": on_grid,
        "missing_on_grid": holes,
    }


@dataclass(frozen=True, repr=False)
class Recording:
    """Cleaned samples of two channels, ready for estimation.

    Samples are sorted by trajectory, then by time.  All arrays have the same
    length ``n``.

    Attributes
    ----------
    times : ndarray, shape (n,)
        Sample times in ``time_unit`` (seconds from the first sample when the input
        had timestamps).
    values : ndarray, shape (n, 2)
        The two channels.
    trajectory : ndarray of int, shape (n,)
        Trajectory code 0..R-1 of each sample; samples of one code are contiguous.
    segment : ndarray of int, shape (n,)
        Gap-free segment code of each sample; a new segment starts at each new
        trajectory and after each gap.  Consecutive samples may be paired only
        within a segment.
    outlier : ndarray of bool, shape (n,)
        Samples flagged as outliers (kept unless the user asked to drop them).
    source_rows : ndarray of int, shape (n,)
        Input row (line number or index) of each sample; for merged samples, the
        first of the rows averaged.
    channels : tuple of str
        The two channel names.
    units : tuple of (str or None)
        Units of the two channels parsed from the headers.
    time_unit : str or None
        Unit of ``times``.
    trajectory_names : tuple of str
        Name of each trajectory code.
    log : CleaningLog
        What happened to every input row.
    source : str or None
        File name or a description of the source.
    time_origin : str or None
        The first timestamp when the input had absolute timestamps.
    jitter_tolerance : float
        Largest relative step deviation for the sampling to count as uniform.
    source_columns : dict
        The input columns used: ``time`` (header), ``channels`` (two headers) and
        ``trajectory`` (header or ``None``).
    """

    times: np.ndarray
    values: np.ndarray
    trajectory: np.ndarray
    segment: np.ndarray
    outlier: np.ndarray
    source_rows: np.ndarray
    channels: tuple[str, str]
    units: tuple[str | None, str | None]
    time_unit: str | None
    trajectory_names: tuple[str, ...]
    log: CleaningLog
    source: str | None = None
    time_origin: str | None = None
    jitter_tolerance: float = field(default=0.01)
    source_columns: dict[str, Any] = field(default_factory=dict, compare=False)

    # -- basic facts ------------------------------------------------------------
    @property
    def n_samples(self) -> int:
        """Number of samples."""
        return int(self.times.shape[0])

    @property
    def n_trajectories(self) -> int:
        """Number of independent trajectories."""
        return len(self.trajectory_names)

    @property
    def n_gaps(self) -> int:
        """Number of gaps (segment boundaries inside trajectories)."""
        n_segments = int(np.unique(self.segment).size)
        return n_segments - self.n_trajectories

    def sampling(self) -> dict[str, Any]:
        """Sampling description; see :func:`describe_sampling` (gaps excluded)."""
        return describe_sampling(self.times, self.segment, self.jitter_tolerance)

    def time_span(self) -> float:
        """Longest time span of one trajectory."""
        spans = [
            float(self.times[m].max() - self.times[m].min())
            for m in (self.trajectory == k for k in range(self.n_trajectories))
            if m.any()
        ]
        return max(spans) if spans else 0.0

    def trajectories(self):
        """Yield ``(name, times, values)`` for each trajectory."""
        for k, name in enumerate(self.trajectory_names):
            m = self.trajectory == k
            yield name, self.times[m], self.values[m]

    def segment_bounds(self) -> list[tuple[int, int]]:
        """``(start, stop)`` index pairs of the gap-free segments."""
        if self.n_samples == 0:
            return []
        change = np.flatnonzero(np.diff(self.segment) != 0) + 1
        starts = np.concatenate([[0], change])
        stops = np.concatenate([change, [self.n_samples]])
        return list(zip(starts.tolist(), stops.tolist(), strict=True))

    def select(self, mask: np.ndarray) -> Recording:
        """A recording with only the samples where ``mask`` is true (same log)."""
        mask = np.asarray(mask, dtype=bool)
        return replace(
            self,
            times=self.times[mask],
            values=self.values[mask],
            trajectory=self.trajectory[mask],
            segment=self.segment[mask],
            outlier=self.outlier[mask],
            source_rows=self.source_rows[mask],
        )

    def with_values(self, values: np.ndarray) -> Recording:
        """The same sampling with other channel values (used by simulation)."""
        values = np.asarray(values, dtype=float)
        if values.shape != self.values.shape:
            raise ValueError(f"values must have shape {self.values.shape}, got {values.shape}")
        return replace(self, values=values)

    def samples_per_trajectory(self) -> dict[str, int]:
        """Number of samples of each trajectory, by name."""
        counts = np.bincount(self.trajectory, minlength=self.n_trajectories)
        return {name: int(c) for name, c in zip(self.trajectory_names, counts, strict=True)}

    # -- output -----------------------------------------------------------------
    def to_frame(self):
        """The cleaned samples as a pandas DataFrame (importer-readable layout)."""
        import pandas as pd

        def head(name: str, unit: str | None) -> str:
            return f"{name} [{unit}]" if unit else name

        tname = head("time", self.time_unit)
        frame = pd.DataFrame(
            {
                "trajectory": [self.trajectory_names[k] for k in self.trajectory],
                tname: self.times,
                head(self.channels[0], self.units[0]): self.values[:, 0],
                head(self.channels[1], self.units[1]): self.values[:, 1],
                "outlier": self.outlier,
                "source_row": self.source_rows,
            }
        )
        return frame

    def describe(self) -> dict[str, Any]:
        """Counts and sampling facts (the ``fitdyn check --json`` layout)."""
        log = self.log.to_dict()
        return {
            "source": self.source,
            "input_rows": log["input_rows"],
            "kept_rows": log["kept_rows"],
            "dropped_rows": log["dropped_rows"],
            "dropped": log["dropped"],
            "merged_rows": log["merged_rows"],
            "outliers": log["outliers"],
            "flagged": log["flags"],
            "trajectories": self.n_trajectories,
            "trajectory_names": list(self.trajectory_names),
            "samples_per_trajectory": self.samples_per_trajectory(),
            "samples": self.n_samples,
            "columns": dict(self.source_columns),
            "channels": list(self.channels),
            "units": list(self.units),
            "time_unit": self.time_unit,
            "time_origin": self.time_origin,
            "time_span": self.time_span(),
            "gaps": self.n_gaps,
            "segments": len(self.segment_bounds()),
            "sampling": self.sampling(),
            "notes": log["notes"],
        }

    def summary(self) -> str:
        """Printable description of the recording and its cleaning."""
        d = self.describe()
        s = d["sampling"]
        unit = f" {self.time_unit}" if self.time_unit else ""
        chans = ", ".join(
            f"{c} [{u}]" if u else c for c, u in zip(self.channels, self.units, strict=True)
        )
        if s["steps"] == 0:
            sampling = "too few samples to tell"
        else:
            kind = "uniform" if s["uniform"] else "irregular"
            sampling = (
                f"{kind}, median step {s['median_step']:.6g}{unit}, "
                f"jitter {100 * s['jitter']:.3g} % of the median step"
            )
            if not s["uniform"] and s["on_grid"]:
                sampling += (
                    f" (a uniform grid with {s['missing_on_grid']} missing sample(s) "
                    "inside segments)"
                )
        per = d["samples_per_trajectory"]
        if 1 < len(per) <= 8:
            traj = f"{d['trajectories']} ({', '.join(f'{k}: {v}' for k, v in per.items())})"
        else:
            traj = f"{d['trajectories']}"
        lines = [
            f"source          {self.source}",
            f"channels        {chans}",
            f"time unit       {self.time_unit or 'not given'}",
            f"trajectories    {traj}",
            f"samples         {d['samples']}",
            f"time span       {d['time_span']:.6g}{unit}",
            f"sampling        {sampling}",
            f"gaps            {d['gaps']}",
        ]
        if self.time_origin:
            lines.append(f"time origin     {self.time_origin}")
        lines.append(self.log.summary())
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.summary()

    def __repr__(self) -> str:
        chans = ", ".join(
            f"{c} [{u}]" if u else c for c, u in zip(self.channels, self.units, strict=True)
        )
        R = self.n_trajectories
        return (
            f"<Recording {self.source or 'in-memory data'}: {chans}; {self.n_samples} samples "
            f"in {R} trajector{'y' if R == 1 else 'ies'}, {self.n_gaps} gap(s); "
            f"time unit {self.time_unit or 'not given'}>"
        )
