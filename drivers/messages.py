"""Short, one-line wording of low-level exceptions for driver error messages."""
from __future__ import annotations


def short(exc: BaseException) -> str:
    """The exception's text on one line (its class name if it has none)."""
    return " ".join(str(exc).split()) or exc.__class__.__name__


def open_reason(exc: BaseException, what: str = "port") -> str:
    """Why opening a port or resource failed, in words a user can act on."""
    text = short(exc)
    if "No such file" in text or "[Errno 2]" in text or "RSRC_NFOUND" in text:
        return f"no such {what}; see `modetick ports` for what is connected"
    if "Permission denied" in text or "[Errno 13]" in text:
        return "permission denied; on Linux add yourself to the dialout group"
    if "[Errno 16]" in text or "Device or resource busy" in text:
        return f"{what} busy; another program holds it"
    return text


def raise_first(problems: list[tuple[str, str]], section: str) -> None:
    """Raise the first settings problem as a DeviceError naming the rig-file key."""
    if problems:
        from drivers.base import DeviceError

        key, msg = problems[0]
        raise DeviceError(f"[{section}] {key}: {msg}")
