"""Value rows made on demand, a run of events at a time, for outputs too large to hold at once."""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Iterator

import numpy as np
import pandas as pd


class ValueSource(ABC):
    """The values of an adapter's output (:data:`~harmonize.adapters.base.VALUE_COLUMNS`),
    made when asked for instead of held as one frame.

    A trawl catch file of 1e7 rows gives about 2.5e7 value rows; the pipeline asks for them
    in the order in which it writes the events and turns each frame into observation rows
    before it asks for the next, so memory holds one run of events' values at a time.
    """

    @abstractmethod
    def blocks(self, order: np.ndarray, rows: int) -> Iterator[tuple[np.ndarray, pd.DataFrame]]:
        """Value frames for consecutive runs of the events ``order`` (positions in the
        output's ``events``), in that order, of about ``rows`` value rows each (a run holds
        at least one event, so a frame may be larger), each with its rows' events: per value
        row, the position of its event in the output's ``events`` (the pipeline checks that
        they agree with the values' event ids, and looks up no id).

        Every value row of the output is in exactly one frame; within an event, values keep
        the order of :meth:`frame`. At least one frame is yielded (empty when there are no
        values).
        """

    @abstractmethod
    def frame(self) -> pd.DataFrame:
        """All values as one frame (as adapters without a source give them)."""
