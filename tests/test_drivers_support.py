"""Shared helpers for the driver tests (no tests here).

Rigs are built the way a user builds them: TOML text through the real rig
loader (``daq.rig.parse_rig``), so the driver keys, their defaults and their
types are exercised too.
"""
from __future__ import annotations

import json
import re

import pytest

# Reply timeouts of the rigs tests build. A loaded CI machine (2 cores, fresh VM) can
# stall a thread for half a second. A reply that is due gets REPLY_S: a read returns
# as soon as the line is in, so a long timeout costs nothing while all is well.
REPLY_S = 2.0
# A test that provokes a timeout on purpose and still needs other replies in time (a
# retry that must get through, an error that quotes a partial reply or the error queue)
# uses WAITED_S: longer than a stall, and paid once for every timeout it provokes.
WAITED_S = 1.0

SWEEP = """
[sweep]
start = 100
stop = 300
step = 1
"""


def toml_str(value: str) -> str:
    """A TOML basic string (json.dumps escapes \\r, \\n and quotes the same way)."""
    return json.dumps(value)


def toml_line(key: str, value) -> str:
    if isinstance(value, bool):
        return f"{key} = {'true' if value else 'false'}"
    if isinstance(value, str):
        return f"{key} = {toml_str(value)}"
    return f"{key} = {json.dumps(value)}"


def section(name: str, **keys) -> str:
    return f"[{name}]\n" + "\n".join(toml_line(k, v) for k, v in keys.items() if v is not None) + "\n"


def sections(stage: dict, detector: dict | None = None, extra: str = "") -> dict:
    from daq.rig import parse_rig

    text = section("stage", **stage) + section("detector", **(detector or {"driver": "sim"})) + SWEEP + extra
    return parse_rig(text, "test-rig").sections


def stepper_stage_keys(port: str, proto, **overrides) -> dict:
    """The [stage] keys a user would write for an emulated controller's protocol."""
    def rx(fmt: str, group: str) -> str:
        head, _, tail = fmt.partition("{" + group + "}")
        return re.escape(head) + rf"(?P<{group}>[-+]?\d+)" + re.escape(tail)

    eol = "\r" if proto.eol_in == "any-crlf" else proto.eol_in
    keys = dict(driver="serial-ascii", port=port, eol=eol, move_abs=proto.move_abs,
                ack_reply=re.escape(proto.ack) if proto.ack else None,
                query_position=proto.query_position, position_reply=rx(proto.position_reply, "steps"),
                busy_query=proto.busy_query,
                idle_reply=re.escape(proto.idle_reply) if proto.busy_query else None,
                busy_reply=re.escape(proto.busy_reply) if proto.busy_query else None,
                stop_command=proto.stop, echo=proto.echo, identify_query=proto.identify_query,
                speed_command=proto.set_speed,
                timeout_s=REPLY_S, backoff_s=0.01, poll_s=0.001)
    keys.update(overrides)
    return keys


def one_line(message: str) -> bool:
    return "\n" not in message and "\r" not in message and "Traceback" not in message


@pytest.fixture
def comb():
    from sims.emulators.physics import CombPhysics, LockedPhysics

    raw = CombPhysics()
    return raw, LockedPhysics(raw)


def wait_for(condition, timeout_s: float = 10.0) -> bool:
    """Poll until condition() is true (emulator threads answer asynchronously).

    Returns as soon as it is; the long limit only matters on a stalled machine.
    """
    import time

    deadline = time.monotonic() + timeout_s
    while not condition():
        if time.monotonic() > deadline:
            return False
        time.sleep(0.002)
    return True
