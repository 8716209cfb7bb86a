"""Reading a CSV of readings (``time,value[,ambient]``) with errors that name the file and line."""

from __future__ import annotations

import csv
import io
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from thermeta.daemon.ingest.payloads import ASCII_DECIMAL, ASCII_SPACE, NOT_FINITE
from thermeta.daemon.timefmt import parse_time
from thermeta.storage.errors import InputError


@dataclass
class Series:
    t: np.ndarray
    y: np.ndarray
    ambient_t: np.ndarray | None
    ambient_y: np.ndarray | None
    last_line: int = 0  # the file's last line read, for messages about the readings as a whole
    skipped: tuple[int, ...] = ()  # lines with a time but no value (blank), skipped

    def skipped_note(self, name: str) -> str | None:
        """The warning about skipped lines, or None."""
        if not self.skipped:
            return None
        return (
            f"{name}:{self.skipped[0]}: {len(self.skipped)} line(s) with a blank value skipped "
            f"(the first here)"
        )


def _number(text: str, where: str, column: str) -> float:
    bare = text.strip(ASCII_SPACE)
    if bare.lstrip("+-").lower() in NOT_FINITE:
        raise InputError(f"{where}: {column}: not a finite number: {text.strip()!r}")
    if not ASCII_DECIMAL.fullmatch(bare):
        raise InputError(f"{where}: {column}: not a number: {text.strip()!r}")
    value = float(text)
    if not math.isfinite(value):
        raise InputError(f"{where}: {column}: not a finite number: {text.strip()!r}")
    return value


def read_series(path: str | Path) -> Series:
    """Parse ``path``; raise InputError('FILE:LINE: problem') on the first bad thing found."""
    name = str(path)
    try:
        raw = Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError(f"{name}: no such file") from None
    except IsADirectoryError:
        raise InputError(f"{name}: is a directory, not a CSV file") from None
    except OSError as exc:
        raise InputError(f"{name}: cannot read: {exc.strerror or exc}") from None
    if b"\x00" in raw[:65536]:
        raise InputError(f"{name}: binary data, not a CSV text file")
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = raw[: exc.start].count(b"\n") + 1
        raise InputError(f"{name}:{line}: not UTF-8 text (byte {exc.start})") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    try:
        header = next(reader)
    except StopIteration:
        raise InputError(f"{name}: empty file (want a header line such as 'time,value')") from None
    except csv.Error as exc:
        raise InputError(f"{name}:1: {exc}") from None
    cols = [h.strip().lower() for h in header]
    for needed in ("time", "value"):
        if needed not in cols:
            raise InputError(
                f"{name}:1: missing column '{needed}' (header is {','.join(header)!r})"
            )
    i_t, i_v = cols.index("time"), cols.index("value")
    i_a = cols.index("ambient") if "ambient" in cols else None
    t: list[float] = []
    y: list[float] = []
    at: list[float] = []
    ay: list[float] = []
    skipped: list[int] = []
    try:
        for row in reader:
            where = f"{name}:{reader.line_num}"
            if not row or all(not c.strip() for c in row):
                continue
            if len(row) <= max(i_t, i_v):
                raise InputError(f"{where}: expected {len(cols)} columns, got {len(row)}")
            if len(row) > len(cols):
                raise InputError(
                    f"{where}: {len(row)} fields where the header has {len(cols)} (a decimal "
                    "comma? write 3.1 with a point, or quote the field)"
                )
            try:
                ts = parse_time(row[i_t])
            except ValueError as exc:
                raise InputError(f"{where}: time: {exc}") from None
            if row[i_v].strip():
                t.append(ts)
                y.append(_number(row[i_v], where, "value"))
            else:
                skipped.append(reader.line_num)
            if i_a is not None and len(row) > i_a and row[i_a].strip():
                at.append(ts)
                ay.append(_number(row[i_a], where, "ambient"))
    except csv.Error as exc:
        raise InputError(f"{name}:{reader.line_num}: {exc}") from None
    if not t:
        raise InputError(f"{name}: no readings after the header")
    has_amb = i_a is not None and bool(ay)
    return Series(
        t=np.asarray(t),
        y=np.asarray(y),
        ambient_t=np.asarray(at) if has_amb else None,
        ambient_y=np.asarray(ay) if has_amb else None,
        last_line=reader.line_num,
        skipped=tuple(skipped),
    )
