"""A serial port on a pseudo-terminal, served by a thread, with fault injection.

``os.openpty()`` gives a master/slave pair; a driver opens the slave path
(``/dev/pts/N``) through real pyserial (or pyvisa-py's ASRL resources) and
this thread answers on the master through a protocol handler. The slave is
put in raw mode and kept open here, so the pty lives while clients come and
go; ``pull_cable()`` closes it all at once, as an unplugged adapter would.

A handler has ``eol_in`` (terminator of incoming lines; "any-crlf" accepts CR,
LF or both), ``handle(line, now) -> list[Reply]`` and ``tick(now)``; a Reply
may wait until a condition holds (e.g. G-code's dwell answers after motion).
"""
from __future__ import annotations

import os
import random
import re
import select
import threading
import time
import tty
from collections import deque
from dataclasses import dataclass
from typing import Callable


@dataclass
class Reply:
    text: str
    ready: Callable[[], bool] | None = None   # send only once this returns True
    not_before: float = 0.0                    # monotonic time; used for late replies


class Handler:
    """Base of the device logics served on a pty (defaults: never busy, nothing urgent)."""

    eol_in = "\n"

    def busy(self) -> bool:
        return False

    def tick(self, now: float) -> None:
        pass

    def is_urgent(self, line: str) -> bool:
        """A line handled at once even while earlier replies wait (an emergency stop)."""
        return False

    def handle(self, line: str, now: float) -> list[Reply]:
        raise NotImplementedError


class Faults:
    """Faults to inject, each for a number of upcoming replies (thread safe).

    Counted faults: ``garble`` (a reply with corrupted characters), ``late``
    (a reply held back ``late_s`` seconds), ``drop`` (no reply), ``wrong_eol``
    (a reply ending in ``wrong_eol_text`` instead of the terminator). With
    ``close_after`` set, the port is closed (cable pulled) when that many more
    commands have arrived. ``rates`` gives random per-reply probabilities for
    the same kinds (seeded), for long soak runs.
    """

    KINDS = ("garble", "late", "drop", "wrong_eol")

    def __init__(self, seed: int = 0):
        self._lock = threading.Lock()
        self.pending = {k: 0 for k in self.KINDS}
        self.rates = {k: 0.0 for k in self.KINDS}
        self.late_s = 0.5
        self.wrong_eol_text = ";"
        self.close_after: int | None = None
        self.injected = {k: 0 for k in self.KINDS}
        self._rng = random.Random(seed)

    def inject(self, kind: str, count: int = 1) -> None:
        if kind not in self.KINDS:
            raise ValueError(f"unknown fault {kind!r} (known: {', '.join(self.KINDS)})")
        with self._lock:
            self.pending[kind] += count

    def next_fault(self) -> str | None:
        with self._lock:
            for kind in self.KINDS:
                if self.pending[kind] > 0:
                    self.pending[kind] -= 1
                    self.injected[kind] += 1
                    return kind
            for kind in self.KINDS:
                if self.rates[kind] and self._rng.random() < self.rates[kind]:
                    self.injected[kind] += 1
                    return kind
        return None

    def command_arrived(self) -> bool:
        """Count one command; True when the cable should be pulled now."""
        with self._lock:
            if self.close_after is None:
                return False
            self.close_after -= 1
            return self.close_after <= 0


def garble(text: str) -> bytes:
    """Corrupt a reply the way line noise does: flipped characters and a non-ASCII byte."""
    data = bytearray(text.encode("ascii", errors="replace") or b"?")
    for i in range(0, len(data), 3):
        data[i] = ord("#")
    return bytes(data[:1]) + b"\xfe" + bytes(data[1:])


class PtyPort:
    """One emulated device on a pseudo-terminal; ``path`` is what a driver opens."""

    def __init__(self, handler, eol_out: str, name: str = "device"):
        self.handler, self.name = handler, name
        self.eol_out = eol_out.encode("ascii")
        self.faults = Faults()
        self.master, self._slave = os.openpty()
        tty.setraw(self._slave)
        self.path = os.ttyname(self._slave)
        self.received: list[str] = []          # every command line, for tests to inspect
        self._out: deque[Reply] = deque()
        self._backlog: deque[str] = deque()
        self._stop = threading.Event()
        self._closed = False
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._serve, name=f"emulator {name} {self.path}", daemon=True)

    # -- lifecycle ------------------------------------------------------------
    def start(self) -> "PtyPort":
        self._thread.start()
        return self

    def __enter__(self) -> "PtyPort":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.close()

    def pull_cable(self) -> None:
        """Close the port at once, as if the USB adapter were unplugged."""
        with self._lock:
            if self._closed:
                return
            self._closed = True
            for fd in (self.master, self._slave):
                try:
                    os.close(fd)
                except OSError:
                    pass

    def close(self) -> None:
        self._stop.set()
        if self._thread.is_alive() and threading.current_thread() is not self._thread:
            self._thread.join(timeout=2)
        self.pull_cable()

    @property
    def closed(self) -> bool:
        return self._closed

    # -- serving ----------------------------------------------------------------
    def _split(self, buf: bytes) -> tuple[list[bytes], bytes]:
        eol = self.handler.eol_in
        if eol == "any-crlf":
            parts = re.split(rb"\r\n|\r|\n", buf)
        else:
            parts = buf.split(eol.encode("ascii"))
        return [p for p in parts[:-1]], parts[-1]

    def _serve(self) -> None:
        buf = b""
        while not self._stop.is_set() and not self._closed:
            wait = 0.002 if (self._out or self.handler.busy()) else 0.05
            try:
                readable, _, _ = select.select([self.master], [], [], wait)
                data = os.read(self.master, 4096) if readable else b""
            except (OSError, ValueError):
                return                     # pulled: the fd is gone
            now = time.monotonic()
            self.handler.tick(now)
            buf += data
            lines, buf = self._split(buf)
            for raw in lines:
                line = raw.decode("ascii", errors="replace").strip()
                if not line and self.handler.eol_in == "any-crlf":
                    continue
                self.received.append(line)
                if self.faults.command_arrived():
                    self.pull_cable()
                    return
                if self._out and not self.handler.is_urgent(line):
                    self._backlog.append(line)    # device busy answering: queue like a firmware buffer
                else:
                    self._out.extend(self.handler.handle(line, now))
            self._drain(now)

    def _drain(self, now: float) -> None:
        while True:
            while self._out:
                head = self._out[0]
                if head.ready is not None and not head.ready():
                    return
                if head.not_before == 0.0:
                    kind = self.faults.next_fault()
                    if kind == "late":
                        head.not_before = now + self.faults.late_s
                    elif kind is not None:
                        self._out.popleft()
                        self._send(head.text, kind)
                        continue
                    else:
                        head.not_before = now
                if now < head.not_before:
                    return
                self._out.popleft()
                self._send(head.text, None)
            if not self._backlog:
                return
            line = self._backlog.popleft()
            self._out.extend(self.handler.handle(line, now))

    def _send(self, text: str, fault: str | None) -> None:
        if fault == "drop":
            return
        if fault == "garble":
            data = garble(text) + self.eol_out
        elif fault == "wrong_eol":
            data = text.encode("ascii") + self.faults.wrong_eol_text.encode("ascii")
        else:
            data = text.encode("ascii") + self.eol_out
        try:
            os.write(self.master, data)
        except OSError:
            self._closed = True
