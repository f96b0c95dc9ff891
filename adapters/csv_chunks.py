"""One chunk of whole lines of a CSV export → readings, quarantine rows and notes.

`CsvChunkParser._parse` splits a chunk into columns (pyarrow when every line is a row,
else line by line), parses the times, converts the values to SI and sends each bad row
or cell to the quarantine with its line and reason. The rules are described in
`adapters.csv_source`; the file ledger that cuts a file into chunks lives there too.
"""

from __future__ import annotations

import csv
import io
from collections import Counter
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any
from zoneinfo import ZoneInfo

import numpy as np
import numpy.typing as npt
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from adapters.csv_layout import HeaderLayout
from adapters.records import empty_quarantine, empty_readings
from adapters.source_tools import (
    NULL_TOKENS,
    RAW_MAX,
    TIME_REASONS,
    arrow_text,
    encode_text,
    name_list,
    nonfinite_groups,
    parse_times,
    quality_good,
    quarantine_frame,
    readings_frame,
    to_float,
)

__all__ = ["GROUP_AT", "LONG_LINE_REASON", "MAX_LINE_BYTES", "CsvChunkParser"]

#: A line longer than this [bytes] is not a CSV record of a historian export; the same
#: as Arrow's default block size, so a line up to this length is still parsed fast.
MAX_LINE_BYTES = 1 << 20
#: More unknown tags than this in one chunk give one grouped quarantine row.
GROUP_AT = 10
#: The quarantine reason of a line longer than `MAX_LINE_BYTES`.
LONG_LINE_REASON = f"line longer than {MAX_LINE_BYTES:,} bytes: not a CSV record"


@dataclass
class _Chunk:
    """Parsed columns of one chunk; ``lines`` are file line numbers per row."""

    lines: npt.NDArray[np.int64]
    cols: dict[int, npt.NDArray[Any]]  # column index → float or text array
    bad_rows: list[tuple[int, str, str]]  # (line, reason, raw) found while splitting
    blank: int
    #: float columns: cells that held NaN or infinity (the float array has NaN there)
    nonfinite: dict[int, npt.NDArray[np.bool_]] = field(default_factory=dict)


class CsvChunkParser:
    """The chunk parsing of `adapters.csv_source.CsvSource` (its settings below)."""

    delimiter: str
    decimal: str
    zone: ZoneInfo
    quality_map: Mapping[str, bool]
    _si: dict[str, tuple[float, float]]

    def _split(self, data: bytes, first_line: int, layout: HeaderLayout) -> _Chunk:
        """Columns of a chunk: pyarrow when every line is a row, else line by line."""
        wanted = [layout.time_col]
        types: dict[str, pa.DataType] = {f"c{layout.time_col}": pa.string()}
        if layout.kind == "wide":
            for col, _ in layout.tag_cols:
                wanted.append(col)
                types[f"c{col}"] = pa.float64()
        else:
            wanted += [c for c in (layout.tag_col, layout.value_col, layout.quality_col) if c >= 0]
            types.update({f"c{layout.tag_col}": pa.string(), f"c{layout.value_col}": pa.float64()})
            if layout.quality_col >= 0:
                types[f"c{layout.quality_col}"] = pa.string()
        try:
            data.decode("utf-8")
        except UnicodeDecodeError:  # Arrow refuses such a chunk, and its row handler
            return self._split_slowly(data, first_line, layout, wanted)  # cannot be called
        invalid: list[int] = []

        def on_invalid(_row: Any) -> str:
            invalid.append(1)
            return "skip"

        for typed in (True, False):
            try:
                table = pacsv.read_csv(
                    io.BytesIO(data),
                    read_options=pacsv.ReadOptions(
                        column_names=[f"c{i}" for i in range(layout.n_fields)]
                    ),
                    parse_options=pacsv.ParseOptions(
                        delimiter=self.delimiter,
                        ignore_empty_lines=False,
                        invalid_row_handler=on_invalid,
                    ),
                    convert_options=pacsv.ConvertOptions(
                        column_types=types if typed else {k: pa.string() for k in types},
                        include_columns=[f"c{i}" for i in wanted],
                        decimal_point=self.decimal,
                        null_values=list(NULL_TOKENS),
                        strings_can_be_null=False,
                    ),
                )
            except pa.ArrowInvalid:
                invalid.clear()
                continue  # a cell that is not a number: read the columns as text
            # a quote left open joins lines into one row (Arrow lets a quoted field span
            # a newline): then rows are not lines, and each line is split on its own
            if invalid or table.num_rows != data.count(b"\n"):
                break
            lines = np.arange(first_line, first_line + table.num_rows, dtype=np.int64)
            cols = {i: _column(table.column(f"c{i}")) for i in wanted}
            odd = {i: _nonfinite(table.column(f"c{i}")) for i in wanted if _is_float(cols[i])}
            return _Chunk(lines, cols, [], 0, {i: m for i, m in odd.items() if m.any()})
        return self._split_slowly(data, first_line, layout, wanted)

    def _split_slowly(
        self, data: bytes, first_line: int, layout: HeaderLayout, wanted: list[int]
    ) -> _Chunk:
        """Line by line, for chunks with lines pyarrow cannot place (wrong field count)."""
        text = data.decode("utf-8", errors="replace").split("\n")[:-1]
        raw = [t.rstrip("\r") for t in text]
        lines: list[int] = []
        rows: list[list[str]] = []
        bad: list[tuple[int, str, str]] = []
        blank = 0
        for i, text_line in enumerate(raw):
            # One reader per line: an unclosed quote must not swallow the good lines after it.
            number = first_line + i
            if len(text_line) > MAX_LINE_BYTES:
                bad.append((number, LONG_LINE_REASON, text_line[:RAW_MAX]))
                continue
            try:
                fields = next(csv.reader([text_line], delimiter=self.delimiter, strict=False), [])
            except csv.Error as exc:  # e.g. a field longer than the csv module's limit
                bad.append((number, f"line cannot be split: {exc}", text_line[:RAW_MAX]))
                continue
            if not fields or all(not f.strip() for f in fields):
                blank += 1
            elif len(fields) != layout.n_fields:
                reason = f"expected {layout.n_fields} fields, found {len(fields)}"
                bad.append((number, reason, text_line))
            else:
                lines.append(number)
                rows.append(fields)
        cols: dict[int, Any] = {i: pa.array([r[i] for r in rows], type=pa.string()) for i in wanted}
        return _Chunk(np.asarray(lines, dtype=np.int64), cols, bad, blank)

    def _parse(
        self, data: bytes, first_line: int, key: str, layout: HeaderLayout,
        fold: dict[str, list[Any]],
    ) -> tuple[pd.DataFrame, pd.DataFrame, Counter[str]]:
        """Readings, quarantine and notes of one chunk of whole lines; the readings carry
        the file line of each in a ``line`` column."""
        chunk = self._split(data, first_line, layout)
        notes: Counter[str] = Counter(blank_lines=chunk.blank)
        notes["long_lines"] += sum(reason == LONG_LINE_REASON for _, reason, _ in chunk.bad_rows)
        bad: list[tuple[int, str]] = [(ln, r) for ln, r, _ in chunk.bad_rows]
        known_raw = {ln: raw for ln, _, raw in chunk.bad_rows}
        tcol = chunk.cols[layout.time_col]
        value_cols = [c for c in chunk.cols if c != layout.time_col]
        is_blank = _blank_rows(tcol, [chunk.cols[c] for c in value_cols])
        notes["blank_lines"] += int(is_blank.sum())
        keep = ~is_blank
        tags: tuple[npt.NDArray[np.intp], npt.NDArray[Any]] | None = None
        if layout.kind == "long":
            # Tags as codes into their distinct names: Python strings only for those.
            tags = encode_text(chunk.cols[layout.tag_col])
            keys = tags[1][tags[0]]
            times, status = parse_times(tcol, self.zone, keys=keys, fold=fold)
        else:
            times, status = parse_times(tcol, self.zone, fold=fold)
        for code, reason in TIME_REASONS.items():
            hit = keep & (status == code)
            bad += [(int(ln), reason) for ln in chunk.lines[hit]]
            keep &= ~hit
        if layout.kind == "wide":
            readings = self._wide(chunk, layout, times, keep, bad, notes)
        else:
            assert tags is not None
            readings = self._long(chunk, layout, times, tags, keep, bad, notes)
        # Wide rows can only repeat a (time, tag) pair through a repeated time: check the
        # cheap condition first, the full drop costs more than the whole parse.
        if layout.kind == "long" or times[keep].has_duplicates:
            before = len(readings)
            readings = readings.drop_duplicates(["time", "tag"], keep="last", ignore_index=True)
            notes["duplicate_rows"] += before - len(readings)
        steps = np.diff(times[keep].asi8)
        notes["out_of_order_rows"] += int(np.count_nonzero(steps < 0))
        notes["quarantined"] += len(bad)
        return readings, self._quarantine_rows(data, first_line, key, bad, known_raw), notes

    def _wide(
        self,
        chunk: _Chunk,
        layout: HeaderLayout,
        times: pd.DatetimeIndex,
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[int, str]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        if not layout.tag_cols:
            return empty_readings().assign(line=np.zeros(0, dtype=np.int64))
        columns = []
        for col, tag in layout.tag_cols:
            values = chunk.cols[col]
            odd = chunk.nonfinite.get(col)
            if not _is_float(values):
                values, wrong, odd = to_float(values, self.decimal)
                hit = wrong & keep
                bad += [(int(ln), f"value of {tag} is not a number") for ln in chunk.lines[hit]]
            if odd is not None and (odd & keep).any():
                notes["nonfinite_values"] += int((odd & keep).sum())
                bad += [(int(chunk.lines[i]), r) for i, r in nonfinite_groups(odd & keep, tag)]
                values = np.where(odd, np.nan, values)
            columns.append(values)
        # One (tags x rows) matrix: scaling, masking and melting in a few array operations.
        matrix = np.vstack(columns)
        si = np.array([self._si[tag] for _, tag in layout.tag_cols])
        finite = np.isfinite(matrix)
        with np.errstate(over="ignore", invalid="ignore"):
            matrix = matrix * si[:, :1] + si[:, 1:]
        overflow = finite & ~np.isfinite(matrix) & keep[None, :]
        for row, (_, tag) in enumerate(layout.tag_cols):
            bad += [(int(ln), _overflow_reason(tag)) for ln in chunk.lines[overflow[row]]]
        ok = np.isfinite(matrix) & keep[None, :]
        names = np.array([tag for _, tag in layout.tag_cols], dtype=object)
        tag_col = np.repeat(names, ok.sum(axis=1))
        time_ns = np.broadcast_to(times.asi8, matrix.shape)[ok]
        lines = np.broadcast_to(chunk.lines, matrix.shape)[ok]
        return readings_frame(time_ns, tag_col, matrix[ok], None).assign(line=lines)

    def _long(
        self,
        chunk: _Chunk,
        layout: HeaderLayout,
        times: pd.DatetimeIndex,
        tags: tuple[npt.NDArray[np.intp], npt.NDArray[Any]],
        keep: npt.NDArray[np.bool_],
        bad: list[tuple[int, str]],
        notes: Counter[str],
    ) -> pd.DataFrame:
        ids, uniques = tags
        values = chunk.cols[layout.value_col]
        wrong = np.zeros(len(values), dtype=bool)
        odd = chunk.nonfinite.get(layout.value_col, wrong)
        if not _is_float(values):
            values, wrong, odd = to_float(values, self.decimal)
        blank_tag = keep & (uniques[ids] == "")
        bad += [(int(ln), "blank tag") for ln in chunk.lines[blank_tag]]
        keep &= ~blank_tag
        odd = keep & odd
        if odd.any():
            notes["nonfinite_values"] += int(odd.sum())
            bad += [(int(chunk.lines[i]), r) for i, r in nonfinite_groups(odd, uniques[ids])]
            keep &= ~odd
        for mask, reason in (
            (keep & wrong, "value is not a number"),
            (keep & ~wrong & ~np.isfinite(values), "blank value"),
        ):
            bad += [(int(ln), reason) for ln in chunk.lines[mask]]
            keep &= ~mask
        scale = np.full(len(uniques), np.nan)
        offset = np.zeros(len(uniques))
        unknown: list[tuple[int, str, int]] = []  # (first line, tag, rows)
        for i, name in enumerate(uniques):
            if name in self._si:
                scale[i], offset[i] = self._si[name]
            elif name:
                rows = keep & (ids == i)
                count = int(rows.sum())
                if count:
                    unknown.append((int(chunk.lines[np.argmax(rows)]), str(name), count))
                    keep &= ~rows
        if unknown:
            total = sum(n for _, _, n in unknown)
            notes["unknown_tag_rows"] += total
            if len(unknown) <= GROUP_AT:
                bad += [(ln, f"unknown tag {t!r} ({n} rows in this chunk)") for ln, t, n in unknown]
            else:
                unknown.sort()
                names = name_list([t for _, t, _ in unknown])
                reason = f"{len(unknown):,} tags are not configured tags ({total:,} rows): {names}"
                bad.append((unknown[0][0], reason))
        good = np.ones(len(values), dtype=bool)
        if layout.quality_col >= 0:
            good, unmapped = quality_good(chunk.cols[layout.quality_col], self.quality_map)
            notes["unmapped_quality"] += unmapped
        with np.errstate(over="ignore", invalid="ignore"):
            si = values * scale[ids] + offset[ids]
        overflow = keep & ~np.isfinite(si)
        bad += [(int(chunk.lines[i]), _overflow_reason(str(uniques[ids[i]])))
                for i in np.flatnonzero(overflow)]
        keep &= ~overflow
        return readings_frame(times.asi8[keep], uniques[ids[keep]], si[keep],
                              good[keep]).assign(line=chunk.lines[keep])

    @staticmethod
    def _quarantine_rows(
        data: bytes, first_line: int, key: str, bad: list[tuple[int, str]], known: dict[int, str]
    ) -> pd.DataFrame:
        if not bad:
            return empty_quarantine()
        lines = data.split(b"\n")
        rows = []
        for number, reason in sorted(bad):
            raw = known.get(number)
            if raw is None:
                raw = lines[number - first_line].decode("utf-8", errors="replace").rstrip("\r")
            rows.append((key, number, reason, raw))
        return quarantine_frame(rows)


def _overflow_reason(tag: str) -> str:
    return f"value of {tag} is too large: it overflows when converted to SI units"


def _nonfinite(arr: pa.ChunkedArray) -> npt.NDArray[np.bool_]:
    """Cells of a float column that hold NaN or infinity (not the empty ones)."""
    odd = pc.and_(pc.is_valid(arr), pc.invert(pc.is_finite(arr)))
    return np.asarray(odd.to_numpy(zero_copy_only=False), dtype=bool)



def _column(arr: pa.ChunkedArray) -> Any:
    """A float column as numpy (NaN for empty); a text column stays in Arrow."""
    if pa.types.is_floating(arr.type):
        return arr.to_numpy().astype(np.float64, copy=False)
    return arr.combine_chunks()


def _is_float(col: Any) -> bool:
    return isinstance(col, np.ndarray) and col.dtype == np.float64


def _empty_text(col: Any) -> npt.NDArray[np.bool_]:
    return np.asarray(pc.equal(arrow_text(col), "").to_numpy(zero_copy_only=False), dtype=bool)


def _blank_rows(times: Any, others: list[Any]) -> npt.NDArray[np.bool_]:
    """Rows where every read cell is empty (blank lines, or lines of bare delimiters)."""
    blank = _empty_text(times)
    for col in others:
        if not blank.any():
            break
        blank &= np.isnan(col) if _is_float(col) else _empty_text(col)
    return blank
