"""When an extract's record of stays begins.

An extract of stays holds those discharged since some instant plus the stays then in
progress, so a stay admitted before that instant is on record only because it lasted into
the extract (left truncation). The length-of-stay model starts its landmarks there and gives
earlier-admitted stays a delayed entry (app/forecast/los/rows.py); the demand model counts
admissions only from there (app/forecast/arrivals.py).

The instant is read from the discharges: the first one, unless it stands apart from the rest.
A stay kept in the extract for a reason of its own (linked to another unit's record, a
mistyped date) can put one discharge weeks before the regular record begins; taking it as the
start treats the weeks in between, which hold only the long stays, as fully recorded. So the
start is the first discharge that the next :data:`STEADY_RUN` discharges follow with no gap
longer than :data:`LONGEST_GAP`; where no discharge is so followed (a short or sparse history)
it is the first discharge, as before.

Starting later than the true start is safe: every stay on record admitted before the chosen
instant and still in the unit then was in the unit at it, so conditioning on that is exact; the
stays that left before it are left out. Starting earlier than the true start is not, and that
is the error this rule guards against.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from app.state.frames import NS_PER_DAY, utc_ns

__all__ = ["LONGEST_GAP", "STEADY_RUN", "extract_start_ns"]

# A record is steady once this many discharges follow each other with no gap longer than
# LONGEST_GAP. A unit of a few beds discharges several patients a fortnight; two weeks with
# none at all is a gap in the record, not in the unit. Common practice, no source.
STEADY_RUN = 5
LONGEST_GAP = 14 * NS_PER_DAY


def extract_start_ns(stays: pd.DataFrame, as_of_ns: int, given: int | None = None
                     ) -> int | None:
    """When the extract's record of stays begins (UTC ns): ``given``, else the first discharge
    known at ``as_of_ns`` that starts a steady record (module docstring); None when no stay
    has ended yet."""
    if given is not None:
        return int(given)
    if stays.empty:
        return None
    discharged = np.sort(utc_ns(stays["discharged_at"].dropna()))
    discharged = discharged[discharged <= as_of_ns]
    if discharged.size == 0:
        return None
    gaps = np.diff(discharged)
    if gaps.size >= STEADY_RUN:
        # long[i]: a gap longer than LONGEST_GAP after discharge i; a run of STEADY_RUN short
        # gaps from discharge i has no long one among gaps i .. i + STEADY_RUN - 1.
        long = (gaps > LONGEST_GAP).astype(np.int64)
        in_window = np.convolve(long, np.ones(STEADY_RUN, dtype=np.int64), mode="valid")
        steady = np.flatnonzero(in_window == 0)
        if steady.size:
            return int(discharged[steady[0]])
    return int(discharged[0])
