"""A resident Blockyard: one warm process that runs the commands the command line hands it.

Starting Python and importing pandas, SciPy and SQLAlchemy takes about a second before a
command reads its first row. For a script that calls blockyard again and again (a claim re-checked
on every commit, a blocktest per campaign) that second is most of the time. `blockyard resident
start` starts one process per user that keeps those libraries imported; while it runs, `blockyard`
hands it the commands in FORWARDED over a UNIX socket in a private folder and prints what comes
back: the same output, on the same streams, with the same exit status.

The resident serves one command at a time, each in the caller's working folder and with the
caller's environment, and opens the warehouse afresh for each (so it sees every load at once). It
refuses a caller whose Blockyard differs from its own (another interpreter or version), and
stops when its own files changed on disk (an upgrade); the caller then runs the command itself,
as it does whenever no resident answers. It stops
by itself after --idle minutes without work, on `blockyard resident stop`, or on SIGTERM.
Set BLOCKYARD_RESIDENT=off to keep a command out of it. Linux only (it checks the caller's
user id on the socket).

This module is imported by every `blockyard` call before anything else: the standard library only,
until it is the resident itself.
"""
from __future__ import annotations

import os
import struct
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # for the annotations only: socket is imported where a resident answers
    import socket

# commands that read the warehouse (or write only the ledger) and print: the ones worth forwarding
FORWARDED = frozenset({"peek", "blocktest", "versus", "plan", "recall", "recheck", "inventory", "keep"})
PROTOCOL = 1
DEFAULT_IDLE_MINUTES = 30.0
_HEADER = struct.Struct("!I")


def supported() -> bool:
    if not sys.platform.startswith("linux"):
        return False
    import socket  # (here, not at the top: a command with no resident running never needs it)

    return hasattr(socket, "AF_UNIX")


def runtime_dir() -> Path:
    given = os.environ.get("BLOCKYARD_RUNTIME_DIR")
    if given:
        return Path(given)
    xdg = os.environ.get("XDG_RUNTIME_DIR")
    if xdg:
        return Path(xdg) / "blockyard"
    return Path("/tmp") / f"blockyard-{os.getuid()}"


def socket_path() -> Path:
    return runtime_dir() / "resident.sock"


def private_dir(create: bool) -> Path | None:
    """The runtime folder, if it is ours alone (made so with `create`); None otherwise."""
    d = runtime_dir()
    if create:
        d.mkdir(mode=0o700, parents=True, exist_ok=True)
    try:
        st = d.stat()
    except FileNotFoundError:
        return None
    if st.st_uid != os.getuid() or st.st_mode & 0o077:
        return None
    return d


def code_stamp() -> str:
    """What this Blockyard is: the interpreter, the version, and when its files last changed."""
    from ..version import __version__

    here = Path(__file__).resolve().parents[1]  # the whole package, not this folder alone
    newest, count = 0, 0
    stack = [here]
    while stack:
        with os.scandir(stack.pop()) as it:
            for e in it:
                if e.is_dir(follow_symlinks=False) and e.name != "__pycache__":
                    stack.append(Path(e.path))
                elif e.name.endswith((".py", ".ini")):
                    newest, count = max(newest, e.stat().st_mtime_ns), count + 1
    return os.environ.get("BLOCKYARD_RESIDENT_STAMP") or f"{sys.executable}|{__version__}|{newest}|{count}"


# --- the wire: length-prefixed JSON ------------------------------------------------------------

def _send(sock: socket.socket, doc: dict) -> None:
    import json

    data = json.dumps(doc).encode()
    sock.sendall(_HEADER.pack(len(data)) + data)


def _recv(sock: socket.socket) -> dict | None:
    head = _read(sock, _HEADER.size)
    if head is None:
        return None
    body = _read(sock, _HEADER.unpack(head)[0])
    import json

    return None if body is None else json.loads(body)


def _read(sock: socket.socket, n: int) -> bytes | None:
    parts, got = [], 0
    while got < n:
        chunk = sock.recv(min(n - got, 1 << 20))
        if not chunk:
            return None
        parts.append(chunk)
        got += len(chunk)
    return b"".join(parts)


def _connect(timeout: float = 1.0) -> socket.socket | None:
    # the socket file first: with no resident running, no socket module is imported at all
    if private_dir(create=False) is None:
        return None
    path = socket_path()
    if not path.exists() or not supported():
        return None
    import socket

    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    sock.settimeout(timeout)
    try:
        sock.connect(str(path))
    except OSError:
        sock.close()
        return None
    sock.settimeout(None)
    return sock


def ask(doc: dict, timeout: float = 1.0) -> dict | None:
    """One exchange with the resident; None when none answers."""
    sock = _connect(timeout)
    if sock is None:
        return None
    try:
        _send(sock, doc)
        return _recv(sock)
    except OSError:
        return None
    finally:
        sock.close()


# --- the caller's side -------------------------------------------------------------------------

def _command_of(argv: list[str]) -> str | None:
    i = 0
    while i < len(argv):
        a = argv[i]
        if a in ("-w", "--warehouse"):
            i += 2
            continue
        if a.startswith("--warehouse=") or (a.startswith("-w") and len(a) > 2):
            i += 1
            continue
        return None if a.startswith("-") else a
    return None


def forward(argv: list[str]) -> int | None:
    """Run `argv` in the resident if one runs and the command is one it takes; None otherwise."""
    if os.environ.get("BLOCKYARD_RESIDENT", "").lower() in ("off", "0", "no"):
        return None
    if _command_of(argv) not in FORWARDED:
        return None
    sock = _connect()
    if sock is None:
        return None
    import shutil

    try:
        try:
            request = {"protocol": PROTOCOL, "stamp": code_stamp(), "argv": argv, "cwd": os.getcwd(),
                       "env": dict(os.environ), "isatty": sys.stdout.isatty(),
                       "columns": shutil.get_terminal_size((120, 24)).columns}
            _send(sock, request)
        except OSError:
            return None  # nothing was handed over (a folder gone, say): run it here
        try:
            reply = _recv(sock)
        except KeyboardInterrupt:
            sys.stderr.write("blockyard: interrupted; nothing half-written was kept\n")
            return 130
        except OSError:
            reply = None
        if reply is None:
            sys.stderr.write("blockyard: the resident process stopped while it ran the command; run it again "
                             "(BLOCKYARD_RESIDENT=off runs it here)\n")
            return 1
        if reply.get("refused"):
            return None
        sys.stdout.write(reply.get("stdout", ""))
        sys.stdout.flush()
        sys.stderr.write(reply.get("stderr", ""))
        return int(reply.get("code", 1))
    finally:
        sock.close()


SUGGEST_AFTER = 2.0  # seconds: a cold analysis slower than this may mention the resident, once per user


def suggestion(argv: list[str], seconds: float, terminal: bool) -> str | None:
    """The one line a slow cold command in a terminal may print about the resident, or None.

    Only for a command a resident would have run, typed at a terminal (not a script's pipe),
    when none runs and the user has not turned it off; said once per user (a mark in the private
    runtime folder). The resident stays opt-in: this never starts one."""
    if not terminal or seconds < SUGGEST_AFTER or _command_of(argv) not in FORWARDED:
        return None
    if os.environ.get("BLOCKYARD_RESIDENT", "").lower() in ("off", "0", "no") or not supported():
        return None
    if socket_path().exists():
        return None  # one runs (or its socket is left over): nothing to suggest
    try:
        d = private_dir(create=True)
        if d is None:
            return None
        mark = d / "resident-suggested"
        if mark.exists():
            return None
        mark.touch()
    except OSError:
        return None
    return (f"blockyard: that took {seconds:.1f} s, most of it loading the statistics libraries; "
            "'blockyard resident start' keeps one process ready for the analysis commands (said once)")


# --- the resident's side -----------------------------------------------------------------------

def start(idle_minutes: float) -> dict:
    """Start a resident in the background and wait until it answers."""
    import subprocess

    now = ask({"protocol": PROTOCOL, "op": "status"})
    if now is not None:
        return dict(now, started=False)
    if not supported():
        raise OSError("a resident process needs Linux")
    d = private_dir(create=True)
    if d is None:
        raise OSError(f"{runtime_dir()} is not a private folder of this user; set BLOCKYARD_RUNTIME_DIR to one")
    log = open(d / "resident.log", "ab")
    env = dict(os.environ, BLOCKYARD_RESIDENT="off")
    proc = subprocess.Popen([sys.executable, "-m", "warehouse", "resident", "serve", "--idle", str(idle_minutes)],
                            stdin=subprocess.DEVNULL, stdout=log, stderr=log, env=env, start_new_session=True,
                            cwd="/")
    log.close()
    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        now = ask({"protocol": PROTOCOL, "op": "status"})
        if now is not None:
            return dict(now, started=True)
        if proc.poll() is not None:
            tail = (d / "resident.log").read_text(errors="replace").strip().splitlines()[-1:] or ["(no message)"]
            raise OSError(f"the resident process stopped at once: {tail[0]}")
        time.sleep(0.05)
    raise OSError("the resident process did not answer within a minute")


def stop() -> bool:
    return ask({"protocol": PROTOCOL, "op": "stop"}) is not None


def status() -> dict:
    return ask({"protocol": PROTOCOL, "op": "status"}) or {"running": False, "socket": str(socket_path())}
