"""The run log: one SQLite file per run, the one source for analysis, replay and reports.

Layout (all tables are plain SQLite, readable with the sqlite3 shell):

* ``meta(key, value)``: ``format`` = "modetick-run-log", ``format_version``,
  ``program_version``, ``rig_json`` (the resolved rig as used), ``rig_text``
  (the rig file's text), ``overrides``, ``started_utc``, ``ended_utc``,
  ``status`` (running / finished / stopped / faulted / aborted), ``reason``,
  ``summary_json``, ``counter_state`` (for --resume).
* ``sample_blocks``: samples in blocks of consecutive rows. Each column is a
  little-endian array: ``t_us`` int64 microseconds since the run started and
  ``pos`` int64 steps, both as the first value and zlib-compressed deltas in
  the smallest integer type that holds them; ``dir`` and ``pass``
  zlib-compressed int8/int16; ``value`` and ``spread`` float64 as eight byte
  planes (the exponent planes compress, the noisy low mantissa planes are
  stored raw). ``aux_json`` holds auxiliary channels as
  ``{name: [floats]}`` or is NULL. Blocks keep a night's tens of millions of
  samples at a few bytes each, where a row per sample costs 30-40 bytes.
* ``events(i, t_s, kind, pos, dir, mode, height, width, detail)``: blips,
  reversals, passes, warnings, faults, status changes; ``i`` is the sample
  index the event belongs to.

The file is opened in WAL mode and the engine commits at least once a second,
so a killed process loses at most the last second and the file stays valid.
"""
from __future__ import annotations

import json
import os
import sqlite3
import zlib
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any, Iterator

import numpy as np

from daq import __version__

FORMAT = "modetick-run-log"
FORMAT_VERSION = 2      # 2: tagged column codecs (below); format 1 logs still read

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT);
CREATE TABLE IF NOT EXISTS sample_blocks (
    block INTEGER PRIMARY KEY, first_i INTEGER NOT NULL, n INTEGER NOT NULL,
    t_us BLOB NOT NULL, pos BLOB NOT NULL, dir BLOB NOT NULL, pass BLOB NOT NULL,
    value BLOB NOT NULL, spread BLOB NOT NULL, aux_json TEXT);
CREATE TABLE IF NOT EXISTS events (
    id INTEGER PRIMARY KEY, i INTEGER, t_s REAL, kind TEXT NOT NULL, pos REAL,
    dir INTEGER, mode INTEGER, height REAL, width REAL, detail TEXT);
CREATE INDEX IF NOT EXISTS events_kind ON events(kind);
"""


class LogError(ValueError):
    """A file that is not a readable modetick run log; str() is one line."""


def utc_now() -> str:
    return datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def default_log_path(root: Path | None = None) -> Path:
    stamp = datetime.now(timezone.utc).strftime("%Y%m%dT%H%M%SZ")
    return (root or Path.cwd()) / "runs" / f"{stamp}.db"


# --- column codecs ---------------------------------------------------------

# Format 2 columns start with a tag byte no zlib stream starts with (zlib's first
# byte is 0x78 at every level used here); format 1 columns are one zlib stream.
_TAG_DELTA = b"\x01"    # int64 first value, then zlib(the deltas in the smallest int type)
_TAG_PLANES = b"\x02"   # 8 byte planes, each zlib-compressed or, where that saves less than half, raw
_DELTA_TYPES = ("<i1", "<i2", "<i4", "<i8")
_EMPTY = 255             # delta type code of an empty column
_RAW, _ZLIB = 0, 1


def _pack_delta(a: np.ndarray) -> bytes:
    a = np.asarray(a, dtype=np.int64)
    if a.size == 0:
        return _TAG_DELTA + bytes([_EMPTY])
    d = np.diff(a)
    code = 3
    if d.size:
        lo, hi = int(d.min()), int(d.max())
        code = next(c for c, t in enumerate(_DELTA_TYPES)
                    if np.iinfo(t).min <= lo and hi <= np.iinfo(t).max)
    return (_TAG_DELTA + bytes([code]) + np.int64(a[0]).astype("<i8").tobytes()
            + zlib.compress(d.astype(_DELTA_TYPES[code]).tobytes(), 1))


def _unpack_delta(b: bytes) -> np.ndarray:
    if b[:1] != _TAG_DELTA:                          # format 1
        return np.cumsum(np.frombuffer(zlib.decompress(b), dtype="<i8"))
    if b[1] == _EMPTY:
        return np.zeros(0, np.int64)
    first = int(np.frombuffer(b, "<i8", 1, 2)[0])
    d = np.frombuffer(zlib.decompress(b[10:]), dtype=_DELTA_TYPES[b[1]])
    out = np.empty(d.size + 1, np.int64)
    out[0] = first
    np.cumsum(d, out=out[1:])
    out[1:] += first
    return out


def _pack_small(a: np.ndarray, dtype: str) -> bytes:
    return zlib.compress(np.asarray(a).astype(dtype).tobytes(), 1)


def _unpack_small(b: bytes, dtype: str) -> np.ndarray:
    return np.frombuffer(zlib.decompress(b), dtype=dtype).astype(np.int64)


def _pack_float(a: np.ndarray) -> bytes:
    """Byte planes of the float64s: the sign/exponent planes compress well; the low
    mantissa planes of a noisy reading hardly do, and are kept raw unless zlib
    halves them (inflating them was most of a replay's time, for a quarter of
    their size)."""
    planes = np.ascontiguousarray(np.ascontiguousarray(a, dtype="<f8").view(np.uint8).reshape(-1, 8).T)
    modes, parts = [], []
    for plane in planes:
        raw = plane.tobytes()
        z = zlib.compress(raw, 1)
        use = len(z) < 0.5 * len(raw)
        modes.append(_ZLIB if use else _RAW)
        parts.append(z if use else raw)
    sizes = np.array([len(p) for p in parts], "<u4").tobytes()
    return _TAG_PLANES + bytes(modes) + sizes + b"".join(parts)


def _unpack_float(b: bytes, n: int) -> np.ndarray:
    if b[:1] != _TAG_PLANES:                         # format 1: one shuffled zlib stream
        raw = np.frombuffer(zlib.decompress(b), dtype=np.uint8).reshape(8, n)
        return np.ascontiguousarray(raw.T).view("<f8").reshape(n)
    parts, at = [], 41
    for j, size in enumerate(np.frombuffer(b, "<u4", 8, 9).tolist()):
        part = b[at:at + size]
        at += size
        parts.append(zlib.decompress(part) if b[1 + j] == _ZLIB else part)
    planes = np.frombuffer(b"".join(parts), np.uint8).reshape(8, n)
    return np.ascontiguousarray(planes.T).view("<f8").reshape(n)


@dataclass
class Samples:
    """Columns of logged samples (all the same length)."""

    t_s: np.ndarray
    position_steps: np.ndarray
    direction: np.ndarray
    pass_index: np.ndarray
    value: np.ndarray
    spread: np.ndarray
    aux: dict[str, np.ndarray]

    def __len__(self) -> int:
        return int(self.value.size)


class RunLog:
    """Write side and read side of one run log."""

    def __init__(self, path: Path, conn: sqlite3.Connection):
        self.path = path
        self.conn = conn
        row = conn.execute("SELECT COALESCE(MAX(first_i + n), 0), COALESCE(MAX(block), -1) "
                           "FROM sample_blocks").fetchone()
        self.n_samples, self._last_block = int(row[0]), int(row[1])

    # -- opening ----------------------------------------------------------
    @classmethod
    def create(cls, path: str | Path, rig: Any, status: str = "running", unique: bool = False) -> "RunLog":
        """A new log for a run of ``rig`` (a daq.rig.Rig). Refuses to overwrite; with
        ``unique`` (a default name), takes NAME-2.db, NAME-3.db... instead. The file is
        claimed atomically, so two runs started in the same second never share one."""
        path = Path(path)
        try:
            path.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise LogError(f"log {path}: cannot make its folder ({exc.strerror or exc})") from None
        for k in range(1, 1000 if unique else 2):
            p = path if k == 1 else path.with_name(f"{path.stem}-{k}{path.suffix}")
            try:
                os.close(os.open(p, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644))   # an empty file is a new database
                path = p
                break
            except FileExistsError:
                continue
            except OSError as exc:
                raise LogError(f"log {p}: cannot create it ({exc.strerror or exc})") from None
        else:
            raise LogError(f"log {path}: already exists; choose another --log")
        conn = sqlite3.connect(str(path), check_same_thread=False)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=FULL")  # fsync each commit: a power cut loses at most one flush
        conn.executescript(_SCHEMA)
        log = cls(path, conn)
        log.set_meta(format=FORMAT, format_version=str(FORMAT_VERSION),
                     program_version=__version__, rig_json=rig.to_json(), rig_text=rig.text,
                     overrides=json.dumps(rig.overrides), started_utc=utc_now(), status=status)
        return log

    @classmethod
    def open(cls, path: str | Path, writable: bool = False) -> "RunLog":
        """Open an existing log, checking that it is one."""
        path = Path(path)
        if not path.is_file():
            raise LogError(f"log {path}: no such file")
        uri = path.resolve().as_uri() + ("?mode=rw" if writable else "?mode=ro")
        try:
            conn = sqlite3.connect(uri, uri=True, check_same_thread=False)
            fmt = conn.execute("SELECT value FROM meta WHERE key='format'").fetchone()
        except sqlite3.DatabaseError as exc:
            with open(path, "rb") as fh:
                head = fh.read(256)
            is_sqlite = head.startswith(b"SQLite format 3\x00")
            # an SQLite file that opens but has no meta table is some other database
            damaged = is_sqlite and not isinstance(exc, sqlite3.OperationalError)
            what = "a damaged run log (cut short or overwritten?)" if damaged else "not a modetick run log"
            if head and not is_sqlite and path.suffix.lower() == ".db" and all(
                    32 <= b < 127 or b in b"\r\n\t" for b in head):
                what += "; it is text: a CSV is read when its name ends in .csv"
            raise LogError(f"log {path}: {what} ({exc})") from None
        if not fmt or fmt[0] != FORMAT:
            conn.close()
            raise LogError(f"log {path}: not a modetick run log (no format marker)")
        ver = conn.execute("SELECT value FROM meta WHERE key='format_version'").fetchone()
        if ver and ver[0].isdigit() and int(ver[0]) > FORMAT_VERSION:
            conn.close()
            raise LogError(f"log {path}: format {ver[0]} is newer than this modetick reads "
                           f"({FORMAT_VERSION}); update modetick")
        log = cls(path, conn)
        if writable:
            conn.execute("PRAGMA journal_mode=WAL")
            conn.execute("PRAGMA synchronous=FULL")
            # blocks appended from now on are written in this version's format (the
            # reader takes both, column by column)
            log.set_meta(format_version=str(FORMAT_VERSION))
        return log

    def close(self) -> None:
        self.conn.close()

    # -- meta ---------------------------------------------------------------
    def set_meta(self, **items: str) -> None:
        self.conn.executemany("INSERT OR REPLACE INTO meta(key, value) VALUES (?, ?)",
                              [(k, v) for k, v in items.items()])
        self.conn.commit()

    def meta(self, key: str, default: str | None = None) -> str | None:
        row = self.conn.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return row[0] if row else default

    def rig(self):
        from daq.rig import rig_from_json
        blob = self.meta("rig_json")
        if blob is None:
            raise LogError(f"log {self.path}: holds no rig")
        rig = rig_from_json(blob)
        rig.text = self.meta("rig_text", "") or ""
        return rig

    def summary(self) -> dict | None:
        blob = self.meta("summary_json")
        return json.loads(blob) if blob else None

    # -- writing --------------------------------------------------------------
    def append_samples(self, t_s, position_steps, direction, pass_index, value,
                       spread=None, aux: dict[str, Any] | None = None, commit: bool = True) -> None:
        """Write one block of samples (any length >= 1)."""
        value = np.asarray(value, dtype=np.float64)
        n = int(value.size)
        if n == 0:
            return
        spread = np.zeros(n) if spread is None else np.asarray(spread, dtype=np.float64)
        t_us = np.rint(np.asarray(t_s, dtype=np.float64) * 1e6).astype(np.int64)
        aux_json = None
        if aux:
            aux_json = json.dumps({k: [float(x) for x in v] for k, v in aux.items()})
        self._last_block += 1
        self.conn.execute(
            "INSERT INTO sample_blocks VALUES (?,?,?,?,?,?,?,?,?,?)",
            (self._last_block, self.n_samples, n, _pack_delta(t_us), _pack_delta(position_steps),
             _pack_small(direction, "<i1"), _pack_small(pass_index, "<i2"),
             _pack_float(value), _pack_float(spread), aux_json))
        self.n_samples += n
        if commit:
            self.conn.commit()

    def append_events(self, rows: list[tuple], commit: bool = False) -> None:
        """rows: (i, t_s, kind, pos, dir, mode, height, width, detail)."""
        if rows:
            self.conn.executemany(
                "INSERT INTO events(i, t_s, kind, pos, dir, mode, height, width, detail) "
                "VALUES (?,?,?,?,?,?,?,?,?)", rows)
        if commit:
            self.conn.commit()

    def commit(self) -> None:
        self.conn.commit()

    # The counter's last events at a stop (its open crossing, runs it still held) are
    # provisional: a resumed run restores the counter from before them and counts them
    # again, so they are marked when written and dropped on resume.
    PROVISIONAL = "provisional_events_after"

    def mark_provisional_events(self) -> None:
        """Events appended from now on are provisional (committed before they are written).
        A mark already there stays: the events after it are still provisional (a resume
        that failed before it dropped them)."""
        if self.meta(self.PROVISIONAL) is not None:
            return
        last = self.conn.execute("SELECT COALESCE(MAX(id), 0) FROM events").fetchone()[0]
        self.set_meta(**{self.PROVISIONAL: str(last)})

    def drop_provisional_events(self) -> int:
        """Before a resume: delete the provisional events; returns how many there were."""
        mark = self.meta(self.PROVISIONAL)
        if mark is None:
            return 0
        n = self.conn.execute("DELETE FROM events WHERE id > ?", (int(mark),)).rowcount
        self.conn.execute("DELETE FROM meta WHERE key = ?", (self.PROVISIONAL,))
        self.conn.commit()
        return n

    def finish(self, status: str, summary: dict | None = None, reason: str = "") -> None:
        items = {"status": status, "ended_utc": utc_now(), "reason": reason}
        if summary is not None:
            items["summary_json"] = json.dumps(summary)
        self.set_meta(**items)

    # -- reading --------------------------------------------------------------
    def iter_blocks(self) -> Iterator[Samples]:
        """Yield the samples block by block (low memory, for replay)."""
        try:
            rows = self.conn.execute("SELECT n, t_us, pos, dir, pass, value, spread, aux_json "
                                     "FROM sample_blocks ORDER BY block")
            yield from self._decode_blocks(rows)
        except sqlite3.DatabaseError as exc:
            raise LogError(f"log {self.path}: damaged ({exc})") from None

    def _decode_blocks(self, rows) -> Iterator[Samples]:
        for n, t_us, pos, d, p, v, s, aux_json in rows:
            try:
                aux = {k: np.asarray(x, dtype=np.float64)
                       for k, x in (json.loads(aux_json).items() if aux_json else [])}
                yield Samples(_unpack_delta(t_us) / 1e6, _unpack_delta(pos), _unpack_small(d, "<i1"),
                              _unpack_small(p, "<i2"), _unpack_float(v, n), _unpack_float(s, n), aux)
            except (zlib.error, ValueError, IndexError) as exc:
                raise LogError(f"log {self.path}: damaged sample block ({exc})") from None

    def read_samples(self) -> Samples:
        """All samples, concatenated."""
        blocks = list(self.iter_blocks())
        if not blocks:
            e = np.zeros(0)
            return Samples(e, e.astype(np.int64), e.astype(np.int64), e.astype(np.int64), e, e, {})
        names = sorted({k for b in blocks for k in b.aux})
        aux = {k: np.concatenate([b.aux.get(k, np.full(len(b), np.nan)) for b in blocks]) for k in names}
        cat = lambda attr: np.concatenate([getattr(b, attr) for b in blocks])  # noqa: E731
        return Samples(cat("t_s"), cat("position_steps"), cat("direction"), cat("pass_index"),
                       cat("value"), cat("spread"), aux)

    def events(self, kind: str | None = None) -> list[dict]:
        q = "SELECT i, t_s, kind, pos, dir, mode, height, width, detail FROM events"
        args: tuple = ()
        if kind:
            q, args = q + " WHERE kind=?", (kind,)
        cols = ("i", "t_s", "kind", "pos", "dir", "mode", "height", "width", "detail")
        return [dict(zip(cols, r)) for r in self.conn.execute(q + " ORDER BY id", args)]
