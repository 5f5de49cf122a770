"""Planning scenarios: named changes to a unit, simulated side by side with the current state.

A :class:`Scenario` is a name and a sequence of changes, each a frozen dataclass with
``apply(PlanningInput) -> PlanningInput``:

- :class:`ScaleArrivals`: more or fewer arrivals of a stream or admission type;
- :class:`ScaleStay`: longer or shorter stays for a patient group (for example a step-down
  route), by time scaling of its phase-type distribution (T / f: same shape, mean times f);
- :class:`MoveGroupShare`: a share of one group's arrivals moved to another group (for example
  earlier treatment lowering severity);
- :class:`MoveElectives`: a share of one weekday's booked operations moved to another weekday;
- :class:`SetBeds`: a different number of beds.

:func:`compare` simulates the current state and every scenario with the same seed and
warm-up. The random numbers are tied to slots (``app.stats.planning``, "Common random
numbers"), so replication r of a scenario sees the same patients as replication r of the
current state except where the change makes them differ, and each difference is estimated from
the paired replications.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from app.stats.planning import (
    WEEKDAYS,
    DemandStream,
    ElectiveList,
    PlanningInput,
    scale_arrivals,
    scale_stay,
    simulate,
    t_interval,
)

__all__ = [
    "MoveElectives",
    "MoveGroupShare",
    "ScaleArrivals",
    "ScaleStay",
    "Scenario",
    "SetBeds",
    "change_from_dict",
    "compare",
]


def _share(value: float, name: str) -> float:
    share = float(value)
    if not (math.isfinite(share) and 0 <= share <= 1):
        raise ValueError(f"{name}: must be in [0, 1], got {value!r}")
    return share


def _factor(value: float, name: str, *, allow_zero: bool) -> float:
    factor = float(value)
    if not math.isfinite(factor) or factor < 0 or (factor == 0 and not allow_zero):
        bound = ">= 0" if allow_zero else "> 0"
        raise ValueError(f"{name}: must be finite and {bound}, got {value!r}")
    return factor


@dataclass(frozen=True)
class ScaleArrivals:
    """Multiply the arrivals of some streams by ``factor``.

    Parameters
    ----------
    factor : float
        >= 0; 1.2 means 20% more arrivals, 0 none.
    stream : str, optional
        Only this stream.
    admission_type : str, optional
        Only streams of this admission type (for example ``"emergency"``). With neither
        ``stream`` nor ``admission_type``, every stream.
    """

    factor: float
    stream: str | None = None
    admission_type: str | None = None
    kind: ClassVar[str] = "scale_arrivals"

    def __post_init__(self) -> None:
        object.__setattr__(self, "factor", _factor(self.factor, "factor", allow_zero=True))

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with the change made."""
        return scale_arrivals(
            inp, self.factor, stream=self.stream, admission_type=self.admission_type
        )

    def describe(self) -> str:
        """The change in words."""
        what = self.stream or (f"{self.admission_type} arrivals" if self.admission_type else
                               "all arrivals")
        return f"{what} x {self.factor:g}"


@dataclass(frozen=True)
class ScaleStay:
    """Multiply every stay of a patient group by ``factor`` (0.8: stays 20% shorter).

    Parameters
    ----------
    group : str
    factor : float
        > 0.
    """

    group: str
    factor: float
    kind: ClassVar[str] = "scale_stay"

    def __post_init__(self) -> None:
        object.__setattr__(self, "factor", _factor(self.factor, "factor", allow_zero=False))

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with the change made."""
        target = inp.group(self.group)
        groups = tuple(
            dataclasses.replace(g, stay=scale_stay(g.stay, self.factor)) if g is target else g
            for g in inp.groups
        )
        return inp.replace(groups=groups)

    def describe(self) -> str:
        """The change in words."""
        return f"stays of {self.group} x {self.factor:g}"


@dataclass(frozen=True)
class MoveGroupShare:
    """Move a share of one group's arrivals to another group, in every matching stream.

    In each stream, weight ``share * w_from`` passes from ``from_group`` to ``to_group``
    (added to the stream's weights if absent); the other groups keep theirs.

    Parameters
    ----------
    from_group, to_group : str
    share : float
        In [0, 1].
    admission_type : str, optional
        Only streams of this admission type; default all.
    """

    from_group: str
    to_group: str
    share: float
    admission_type: str | None = None
    kind: ClassVar[str] = "move_group_share"

    def __post_init__(self) -> None:
        object.__setattr__(self, "share", _share(self.share, "share"))
        if self.from_group == self.to_group:
            raise ValueError(f"to_group: must differ from from_group, got {self.to_group!r}")

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with the change made."""
        inp.group(self.from_group)
        inp.group(self.to_group)
        streams: list[DemandStream | ElectiveList] = []
        moved = False
        for s in inp.streams:
            weights = dict(s.group_weights)
            if (self.admission_type is None or s.admission_type == self.admission_type) and (
                weights.get(self.from_group, 0.0) > 0
            ):
                amount = self.share * weights[self.from_group]
                weights[self.from_group] -= amount
                weights[self.to_group] = weights.get(self.to_group, 0.0) + amount
                s = dataclasses.replace(s, group_weights=tuple(weights.items()))
                moved = True
            streams.append(s)
        if not moved:
            raise ValueError(
                f"from_group: no stream sends patients to {self.from_group!r}"
                + (f" among {self.admission_type!r} streams" if self.admission_type else "")
            )
        return inp.replace(streams=tuple(streams))

    def describe(self) -> str:
        """The change in words."""
        return f"{self.share:.0%} of {self.from_group} -> {self.to_group}"


@dataclass(frozen=True)
class MoveElectives:
    """Move a share of one weekday's booked operations to another weekday.

    Parameters
    ----------
    from_weekday, to_weekday : int
        0 = Monday .. 6 = Sunday.
    share : float, default 1
        Share of the ``from_weekday`` list moved, in [0, 1].
    stream : str, optional
        Only this stream; default every :class:`ElectiveList` and every
        :class:`DemandStream` of admission type ``"elective"``.
    """

    from_weekday: int
    to_weekday: int
    share: float = 1.0
    stream: str | None = None
    kind: ClassVar[str] = "move_electives"

    def __post_init__(self) -> None:
        for name in ("from_weekday", "to_weekday"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | np.integer) or not (
                0 <= value <= 6
            ):
                raise ValueError(f"{name}: must be 0 (Monday) .. 6 (Sunday), got {value!r}")
        if self.from_weekday == self.to_weekday:
            raise ValueError(f"to_weekday: must differ from from_weekday, got {self.to_weekday!r}")
        object.__setattr__(self, "share", _share(self.share, "share"))

    def _moves(self, s: DemandStream | ElectiveList) -> bool:
        if self.stream is not None:
            return s.name == self.stream
        return isinstance(s, ElectiveList) or s.admission_type == "elective"

    def _moved(self, by_weekday: tuple[float, ...]) -> tuple[float, ...]:
        values = list(by_weekday)
        amount = self.share * values[self.from_weekday]
        values[self.from_weekday] -= amount
        values[self.to_weekday] += amount
        return tuple(values)

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with the change made."""
        streams: list[DemandStream | ElectiveList] = []
        matched = False
        for s in inp.streams:
            if self._moves(s):
                matched = True
                if isinstance(s, ElectiveList):
                    s = dataclasses.replace(s, booked_by_weekday=self._moved(s.booked_by_weekday))
                else:
                    s = dataclasses.replace(s, rate_by_weekday=self._moved(s.rate_by_weekday))
            streams.append(s)
        if not matched:
            raise ValueError(f"stream: no elective stream matches {self.stream!r}")
        return inp.replace(streams=tuple(streams))

    def describe(self) -> str:
        """The change in words."""
        return (f"{self.share:.0%} of {WEEKDAYS[self.from_weekday]} electives -> "
                f"{WEEKDAYS[self.to_weekday]}")


@dataclass(frozen=True)
class SetBeds:
    """A different number of beds (None: no limit).

    Parameters
    ----------
    beds : int or None
    """

    beds: int | None
    kind: ClassVar[str] = "set_beds"

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with the change made."""
        return inp.replace(beds=self.beds)

    def describe(self) -> str:
        """The change in words."""
        return "no bed limit" if self.beds is None else f"{self.beds} beds"


Change = ScaleArrivals | ScaleStay | MoveGroupShare | MoveElectives | SetBeds
_CHANGES: dict[str, type[Change]] = {
    c.kind: c for c in (ScaleArrivals, ScaleStay, MoveGroupShare, MoveElectives, SetBeds)
}


def _change_to_dict(change: Change) -> dict[str, Any]:
    return {"kind": change.kind, **dataclasses.asdict(change)}


def change_from_dict(data: Mapping[str, Any]) -> Change:
    """Rebuild a change from its dict (``{"kind": ..., **fields}``)."""
    kind = data.get("kind")
    if kind not in _CHANGES:
        raise ValueError(f"data: unknown change kind {kind!r}; known are {sorted(_CHANGES)!r}")
    return _CHANGES[str(kind)](**{k: v for k, v in data.items() if k != "kind"})


@dataclass(frozen=True)
class Scenario:
    """A named what-if: changes applied in order to the current state.

    Parameters
    ----------
    name : str
    changes : sequence of changes
        ScaleArrivals, ScaleStay, MoveGroupShare, MoveElectives, SetBeds.
    """

    name: str
    changes: tuple[Change, ...]

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"name: must be a non-empty string, got {self.name!r}")
        changes = tuple(self.changes)
        for c in changes:
            if not isinstance(c, tuple(_CHANGES.values())):
                raise ValueError(f"changes: {c!r} is not a planning change")
        object.__setattr__(self, "changes", changes)

    def apply(self, inp: PlanningInput) -> PlanningInput:
        """The input with every change made, in order."""
        for change in self.changes:
            inp = change.apply(inp)
        return inp

    def describe(self) -> str:
        """The changes in words, separated by semicolons."""
        return "; ".join(c.describe() for c in self.changes)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; exact round trip with :meth:`from_dict`."""
        return {"name": self.name, "changes": [_change_to_dict(c) for c in self.changes]}

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> Scenario:
        """Inverse of :meth:`to_dict`."""
        return cls(name=str(data["name"]),
                   changes=tuple(change_from_dict(c) for c in data["changes"]))


def compare(
    baseline: PlanningInput,
    scenarios: Sequence[Scenario],
    *,
    baseline_name: str = "current",
    level: float = 0.95,
    progress: Callable[[int, int], None] | None = None,
) -> pd.DataFrame:
    """Simulate the current state and each scenario, and tabulate them side by side.

    All runs use the baseline's seed, days and replications and one common warm-up (the
    longest any of them needs), so replication r of every run shares its random numbers.

    Parameters
    ----------
    baseline : PlanningInput
        The current state.
    scenarios : sequence of Scenario
        Names must be unique and differ from ``baseline_name``.
    baseline_name : str, default "current"
    level : float, default 0.95
    progress : callable, optional
        Called as ``progress(done, total)`` after each run (the current state, then each
        scenario), for a progress bar on long runs.

    Returns
    -------
    pandas.DataFrame
        Tidy, one row per (scenario, metric), baseline first: columns ``scenario``,
        ``description``, ``metric``, ``mean``, ``ci_low``, ``ci_high``, ``difference``,
        ``difference_low``, ``difference_high`` (scenario minus current state, from the
        paired replications; 0 for the baseline). Two input rows per scenario,
        ``beds`` (NaN for no limit) and ``offered_load`` (Erlangs), have no intervals.
        For a side-by-side view: ``frame.pivot(index="metric", columns="scenario",
        values="mean")``.
    """
    names = [baseline_name] + [s.name for s in scenarios]
    if len(set(names)) != len(names):
        raise ValueError(f"scenarios: names must be unique and differ from the baseline's, "
                         f"got {names!r}")
    inputs = [baseline] + [s.apply(baseline) for s in scenarios]
    warmup = max(i.resolved_warmup_days() for i in inputs)
    inputs = [i.replace(warmup_days=warmup) for i in inputs]
    results = []
    for done, i in enumerate(inputs, start=1):
        results.append(simulate(i))
        if progress is not None:
            progress(done, len(inputs))
    descriptions = ["current state"] + [s.describe() for s in scenarios]
    reference = results[0]
    rows: list[dict[str, Any]] = []
    for name, description, inp, result in zip(names, descriptions, inputs, results, strict=True):
        for metric, value in (("beds", inp.beds), ("offered_load", inp.offered_load())):
            base_value = (baseline.beds if metric == "beds" else reference.offered_load)
            number = math.nan if value is None else float(value)
            base = math.nan if base_value is None else float(base_value)
            rows.append(_row(name, description, metric, number, math.nan, math.nan,
                             number - base, math.nan, math.nan))
        for metric in result.metrics:
            e = result.estimate(metric, level)
            if metric in reference.values:
                paired = np.asarray(result.values[metric]) - np.asarray(reference.values[metric])
                d = t_interval(paired, level)
                diff = (d.mean, d.ci_low, d.ci_high)
            else:
                diff = (math.nan, math.nan, math.nan)
            rows.append(_row(name, description, metric, e.mean, e.ci_low, e.ci_high, *diff))
    return pd.DataFrame(rows)


def _row(scenario: str, description: str, metric: str, mean: float, low: float, high: float,
         difference: float, difference_low: float, difference_high: float) -> dict[str, Any]:
    return {"scenario": scenario, "description": description, "metric": metric, "mean": mean,
            "ci_low": low, "ci_high": high, "difference": difference,
            "difference_low": difference_low, "difference_high": difference_high}
