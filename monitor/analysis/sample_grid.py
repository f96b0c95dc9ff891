"""A window's usable readings on a regular grid, and which tags are steady on it.

`SampleGrid` bins the screened samples of a window (`monitor.analysis.quality.screen`)
on a regular UTC grid, one column per tag, in one numpy pass; `steady_by_tag` applies the
steady-state rule of `monitor.analysis.quality.steady_mask` to each tag's column.
`monitor.analysis.window` fits on it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from monitor.analysis.quality import ScreenSettings

__all__ = ["SampleGrid", "grid_step", "steady_by_tag"]


@dataclass(frozen=True)
class SampleGrid:
    """Usable readings on a regular UTC grid: one row per bin, one column per tag.

    The values are the means of the usable samples in each bin ``[t, t + freq)`` (NaN
    where none), as `monitor.analysis.quality.to_wide` gives them; held as one numpy matrix so
    that hundreds of branches cost one pass over the samples, not one per tag.
    """

    index: pd.DatetimeIndex
    values: np.ndarray  # bins × tags [SI]
    columns: dict[str, int]
    seconds: np.ndarray  # bin times from the window start [s]

    @classmethod
    def of(
        cls, flags: pd.DataFrame, tags: list[str], freq: pd.Timedelta,
        start: pd.Timestamp, end: pd.Timestamp,
    ) -> SampleGrid:
        grid = pd.date_range(
            start.tz_convert("UTC").floor(freq), end.tz_convert("UTC"), freq=freq,
            inclusive="left", name="time",
        )
        columns = {tag: j for j, tag in enumerate(tags)}
        value = flags["value"].to_numpy("float64")
        use = flags["usable"].to_numpy(bool) & flags["good"].to_numpy(bool) & np.isfinite(value)
        col = pd.Index(tags).get_indexer(pd.Index(flags["tag"]))
        ns = flags["time"].dt.tz_convert("UTC").to_numpy("datetime64[ns]").view("int64")
        step = int(freq.value)
        row = (ns - (int(grid[0].value) if len(grid) else 0)) // step
        use &= (col >= 0) & (row >= 0) & (row < len(grid))
        cells = row[use] * len(tags) + col[use]
        size = len(grid) * len(tags)
        sums = np.bincount(cells, weights=value[use], minlength=size)
        counts = np.bincount(cells, minlength=size)
        with np.errstate(invalid="ignore", divide="ignore"):
            mean = np.where(counts > 0, sums / counts, np.nan)
        seconds = ((grid - start) / pd.Timedelta(seconds=1)).to_numpy(float)
        return cls(grid, mean.reshape(len(grid), len(tags)), columns, seconds)

    @property
    def empty(self) -> bool:
        return len(self.index) == 0

    def rows(self, keep: np.ndarray) -> SampleGrid:
        return SampleGrid(self.index[keep], self.values[keep], self.columns, self.seconds[keep])

    def column(self, tag: str) -> np.ndarray:
        return self.values[:, self.columns[tag]]

    def frame(self, tags: list[str]) -> pd.DataFrame:
        cols = [self.columns[t] for t in tags]
        return pd.DataFrame(self.values[:, cols], index=self.index, columns=tags)


def steady_by_tag(
    grid: SampleGrid, flow_tags: list[str], pressure_tags: list[str], settings: ScreenSettings
) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
    """Per tag, True where it is steady by `monitor.analysis.quality.steady_mask`'s rule, and the
    rolling variation (std / mean) that the rule compares with its limit [-].

    One rolling pass over all the tags at once (the rule is per column); `steady_mask`
    is the AND of these over its tags.
    """
    window = pd.Timedelta(seconds=settings.steady_window_s)
    index = grid.index
    step = index.to_series().diff().median() if len(index) > 1 else window
    need = max(2, int(0.5 * window / step)) if pd.notna(step) and step > pd.Timedelta(0) else 2
    out: dict[str, np.ndarray] = {}
    variation: dict[str, np.ndarray] = {}
    groups = (
        (flow_tags, settings.steady_flow_rel, settings.steady_flow_floor_m3s),
        (pressure_tags, settings.steady_pressure_rel, settings.steady_pressure_floor_pa),
    )
    for tags, limit, floor in groups:
        if not tags:
            continue
        roll = grid.frame(list(tags)).rolling(window, center=True, min_periods=need)
        std = roll.std().to_numpy()
        mean = roll.mean().to_numpy()
        cv = std / np.maximum(np.abs(mean), floor)
        with np.errstate(invalid="ignore"):
            ok = cv <= limit  # NaN compares False
        out.update({tag: ok[:, j] for j, tag in enumerate(tags)})
        variation.update({tag: cv[:, j] for j, tag in enumerate(tags)})
    return out, variation


def grid_step(grid: SampleGrid, settings: ScreenSettings) -> float:
    """The grid's bin width [s] (the steady-state window when the grid has one row)."""
    if len(grid.seconds) > 1:
        return float(np.min(np.diff(grid.seconds)))
    return settings.steady_window_s
