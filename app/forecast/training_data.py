"""What a unit's history must hold before it can be trained, and which scores it can use.

A real unit's observations are uneven: a site-defined score entered once, a score every stay
carries at the same value, a unit with no scores at all. A feature the history cannot teach
anything about is left out of the model and named in the training report; a unit with too
little history to fit at all is refused with a plain message (``TooLittleHistory``).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

# A score must be known at a morning landmark for this many stays: the hazard tree's leaves
# hold at least ten stays (``los.selection._min_stays``), so a split on a score seen for fewer stays
# cannot be made, and its columns would only be missing values to the model.
MIN_SCORE_STAYS = 10
# Fewer ended stays leave the admission groups' trees nothing to split (they need two stays
# on each side) and the Kaplan-Meier curves a handful of steps.
MIN_ENDED_STAYS = 10


class TooLittleHistory(ValueError):
    """The unit's history cannot be fitted at all; the message says what is missing."""


def screen_scores(observed: Mapping[str, npt.NDArray[np.float64]],
                  stay_index: npt.NDArray[np.int64], names: Sequence[str]
                  ) -> tuple[list[str], list[dict[str, str]]]:
    """The observation names a model can learn from, and the others with the reason.

    ``observed`` holds each name's value at every landmark (NaN: not known then) and
    ``stay_index`` the stay of every landmark.
    """
    kept: list[str] = []
    left_out: list[dict[str, str]] = []
    for name in names:
        values = observed[name]
        known = np.isfinite(values)
        stays = int(np.unique(stay_index[known]).size)
        distinct = np.unique(values[known])
        if stays < MIN_SCORE_STAYS:
            left_out.append({"name": name, "why": (
                f"known at a morning for {stays} stay(s) of this unit; "
                f"at least {MIN_SCORE_STAYS} are needed")})
        elif distinct.size < 2:
            left_out.append({"name": name, "why": (
                f"always {float(distinct[0]):g} on this unit: no variation to learn from")})
        else:
            kept.append(name)
    return kept, left_out


def require_history(unit: str, ended_stays: int, as_of: str) -> None:
    """Refuse a unit with fewer ended stays than any model needs."""
    if ended_stays < MIN_ENDED_STAYS:
        raise TooLittleHistory(
            f"unit {unit} cannot be trained on what was known at {as_of}: {ended_stays} "
            f"stay(s) had ended, at least {MIN_ENDED_STAYS} are needed; import more of the "
            "unit's history or train later")


class KnownColumnsOnly:
    """A regressor fitted on the columns that hold at least one value in its training rows.

    The boosted ensemble (the yardstick beside the tree) cannot bin a column with no value
    at all, which a score first seen after the fitting period, or a covariate a unit never
    records, gives. Such a column carries nothing to learn, so it is left out of the fit and
    of every prediction.
    """

    def __init__(self, model: Any) -> None:
        self.model = model
        self.keep: npt.NDArray[np.bool_] | None = None

    def _columns(self, x: npt.NDArray[Any]) -> npt.NDArray[Any]:
        if self.keep is None:
            raise RuntimeError("fit the model first")
        return x[:, self.keep]

    def fit(self, x: npt.NDArray[Any], y: npt.NDArray[Any],
            sample_weight: npt.NDArray[Any] | None = None) -> KnownColumnsOnly:
        self.keep = np.isfinite(x).any(axis=0)
        self.model.fit(self._columns(x), y, sample_weight=sample_weight)
        return self

    def predict(self, x: npt.NDArray[Any]) -> npt.NDArray[np.float64]:
        return np.asarray(self.model.predict(self._columns(x)), dtype=float)

    def staged_predict(self, x: npt.NDArray[Any]) -> Any:
        yield from self.model.staged_predict(self._columns(x))
