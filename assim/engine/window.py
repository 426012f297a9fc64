"""The fixed-lag smoother's window: the last W days of every member, kept in a ring.

With ``filter.smoother.window_days`` W > 0, each day's analysis updates the current states
and, by the same analysis of the augmented vector (:mod:`assim.filters.smoother`; Evensen &
van Leeuwen 2000), the members' discharge and recorded states of the W previous days. This
module keeps those days: a ring of W slots over the flat (basin x member) batch, one
(basin, member) plane per column, day ``d`` in slot ``d mod W`` (so the slot of a day does not
depend on where a run or a block started). After a day's analysis the day enters the
window and the day W days older leaves it; the values it leaves with are final (smoothed by
the readings of its own day and the W days after it), which is what ``reanalysis.nc``
records. The columns are ``discharge`` (m3 s-1) and the recorded states (mm).

The current states are those of the filter: a fixed-lag smoother corrects the past days,
and the analysis of today's states is the same whether or not the window is kept.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass
class Window:
    """The ring of one chunk.

    size : W, days kept; columns : the names of the kept columns (``discharge`` first)
    values : (W * n_column, basin, member) float64, slot j in rows j * n_column ..
        (j + 1) * n_column - 1 (the planes appended to the analysis vector)
    days : (W,) int64, the day number held by each slot, -1 while empty
    """

    size: int
    columns: tuple[str, ...]
    values: np.ndarray
    days: np.ndarray

    @property
    def n_column(self) -> int:
        return len(self.columns)

    @classmethod
    def empty(cls, size: int, columns: tuple[str, ...], nb: int, nm: int) -> Window:
        """A window with no day yet (zero values: a column without spread, which the
        analysis leaves unchanged)."""
        return cls(size, tuple(columns), np.zeros((size * len(columns), nb, nm)), np.full(size, -1, np.int64))

    @classmethod
    def from_state(cls, window, days, size: int, columns: tuple[str, ...], nb: int, nm: int) -> Window:
        """The window carried by an ensemble state (``EnsembleState.window``, (basin, member,
        slot, column), and its slot days), or an empty one when the state has none of this
        size."""
        if window is None or np.shape(window) != (nb, nm, size, len(columns)):
            return cls.empty(size, columns, nb, nm)
        values = np.ascontiguousarray(np.asarray(window, dtype=np.float64).transpose(2, 3, 0, 1))
        return cls(size, tuple(columns), values.reshape(size * len(columns), nb, nm),
                   np.array(days, dtype=np.int64))

    def to_state(self) -> tuple[np.ndarray, np.ndarray]:
        """(basin, member, slot, column) float64 and (slot,) int64 day numbers: what an
        ensemble state and a restart carry."""
        nb, nm = self.values.shape[1:]
        v = self.values.reshape(self.size, self.n_column, nb, nm).transpose(2, 3, 0, 1)
        return np.ascontiguousarray(v), self.days.copy()

    def bounds(self, lower: np.ndarray, upper: np.ndarray, index: list[int]) -> tuple[np.ndarray, np.ndarray]:
        """Bounds of the window's columns, (basin, member, W * n_column) each: discharge >= 0,
        a state within the model's bounds (``lower``, ``upper`` (basin, member, n_state);
        ``index`` the state column of each kept state)."""
        nb, nm = self.values.shape[1:]
        lo = np.concatenate([np.zeros((nb, nm, 1)), lower[..., index]], axis=-1)
        hi = np.concatenate([np.full((nb, nm, 1), np.inf), upper[..., index]], axis=-1)
        return np.tile(lo, (1, 1, self.size)), np.tile(hi, (1, 1, self.size))

    def push(self, day: int, planes: np.ndarray) -> tuple[int, np.ndarray | None]:
        """Day ``day`` enters the window with its columns ``planes`` (n_column, basin,
        member); returns the day that leaves it and its final values (-1 and None while the
        window is not full; with W = 0 the day itself leaves at once)."""
        if self.size == 0:
            return day, planes
        j = day % self.size
        rows = slice(j * self.n_column, (j + 1) * self.n_column)
        left, out = int(self.days[j]), None
        if left >= 0:
            out = self.values[rows].copy()
        self.values[rows] = planes
        self.days[j] = day
        return left, out

    def held(self) -> list[tuple[int, np.ndarray]]:
        """The days still in the window and their (n_column, basin, member) values, oldest
        first (at the end of a run: smoothed by the readings up to its last day only)."""
        order = [j for j in np.argsort(self.days, kind="stable") if self.days[j] >= 0]
        return [(int(self.days[j]), self.values[j * self.n_column:(j + 1) * self.n_column]) for j in order]


def window_columns(write_states) -> tuple[str, ...]:
    """The columns a window keeps: discharge, then the recorded states."""
    return ("discharge", *write_states)


def emitted_days(nt: int, size: int, first_output: int) -> tuple[int, int]:
    """Which days of a block of ``nt`` days leave the window there and are recorded:
    (e0, n) with e0 the first one's index relative to the block's first day (negative: a
    day of an earlier block) and n their number; a day of block index k leaves on day
    k + ``size``, and is recorded when its index is >= ``first_output`` (block-relative)."""
    e0 = max(-size, first_output)
    return e0, max(0, nt - size - e0)


def held_arrays(window: np.ndarray | None, window_days: np.ndarray | None, columns: tuple[str, ...],
                first_day: int, dtype) -> tuple[int, dict[str, np.ndarray]] | None:
    """The days still in an end state's window from ``first_day`` on, as a reanalysis
    records them: (first day number, name -> (basin, day, member) arrays), or None.

    window : (basin, member, slot, column); window_days : (slot,) day numbers (-1 empty)."""
    if window is None or window_days is None:
        return None
    days = np.asarray(window_days, dtype=np.int64)
    order = [j for j in np.argsort(days, kind="stable") if days[j] >= first_day]
    if not order:
        return None
    return int(days[order[0]]), {name: np.ascontiguousarray(window[:, :, order, c].transpose(0, 2, 1)).astype(dtype)
                                 for c, name in enumerate(columns)}
