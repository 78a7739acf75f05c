"""The resident process itself: one warm Blockyard that serves the commands `handoff.forward`
hands it over its socket, one at a time, in the caller's folder and environment.

Started by `blockyard resident start` as `python -m warehouse resident serve`; the command line
gives `serve` its own `run`, so this module never imports the command line.
"""
from __future__ import annotations

import os
import socket
import struct
import sys
import time

from typing import Callable

from .handoff import (DEFAULT_IDLE_MINUTES, PROTOCOL, _recv, _send, ask, code_stamp, private_dir,
                      runtime_dir, socket_path, supported)


class _Capture:
    """A text stream that says it is a terminal when the caller's is."""

    def __init__(self, tty: bool):
        import io

        self._buf, self._tty = io.StringIO(), tty

    def write(self, s: str) -> int:
        return self._buf.write(s)

    def flush(self) -> None:
        pass

    def isatty(self) -> bool:
        return self._tty

    def getvalue(self) -> str:
        return self._buf.getvalue()

    @property
    def encoding(self) -> str:
        return "utf-8"


def _peer_uid(conn: socket.socket) -> int | None:
    try:
        creds = conn.getsockopt(socket.SOL_SOCKET, socket.SO_PEERCRED, struct.calcsize("3i"))
    except (OSError, AttributeError):
        return None
    return struct.unpack("3i", creds)[1]


def _warm_up() -> None:
    """Import what the forwarded commands use, so the first of them is as quick as the rest."""
    from ..commands import catalog  # noqa: F401
    from .. import analyses, ledger  # noqa: F401
    from ..collapse import coverage, observations  # noqa: F401
    from ..analyze import anova, baseline, censored, designs, failures, pairs, planning, ranks  # noqa: F401
    from ..present import analysis, ledger as ledger_text, text  # noqa: F401
    import tabulate  # noqa: F401


def _run_request(req: dict, run: Callable[..., int]) -> dict:
    saved_env, saved_cwd = dict(os.environ), os.getcwd()
    saved_streams = sys.stdout, sys.stderr
    out, err = _Capture(bool(req.get("isatty"))), _Capture(False)
    try:
        try:
            os.chdir(req["cwd"])
        except OSError as exc:  # nothing has run: the caller can run it itself
            return {"refused": f"cannot enter the caller's folder ({exc.strerror})"}
        os.environ.clear()
        os.environ.update(req.get("env") or {})
        os.environ["COLUMNS"] = str(req.get("columns") or 120)
        os.environ["BLOCKYARD_RESIDENT"] = "off"  # a command run here never forwards again
        if hasattr(time, "tzset"):
            time.tzset()
        sys.stdout, sys.stderr = out, err
        try:
            code = run(list(req["argv"]), out=out, err=err)
        except BaseException as exc:  # noqa: BLE001 - the resident outlives one command's defect
            err.write(f"blockyard: internal error in the resident ({type(exc).__name__}: {exc}); "
                      "BLOCKYARD_RESIDENT=off runs the command without it\n")
            code = 1
    finally:
        sys.stdout, sys.stderr = saved_streams
        os.environ.clear()
        os.environ.update(saved_env)
        if hasattr(time, "tzset"):
            time.tzset()
        os.chdir(saved_cwd)
    return {"stdout": out.getvalue(), "stderr": err.getvalue(), "code": code}


def serve(run: Callable[..., int], idle_minutes: float = DEFAULT_IDLE_MINUTES) -> int:
    """The resident's loop (in the foreground; `start` runs it in the background). `run` is the
    command line's own (argv, out, err) -> exit status."""
    import signal

    if not supported():
        sys.stderr.write("blockyard: a resident process needs Linux\n")
        return 2
    d = private_dir(create=True)
    if d is None:
        sys.stderr.write(f"blockyard: {runtime_dir()} is not a private folder of this user; "
                         "set BLOCKYARD_RUNTIME_DIR to one\n")
        return 2
    path = socket_path()
    if ask({"protocol": PROTOCOL, "op": "status"}) is not None:
        sys.stderr.write("blockyard: a resident process is running already (blockyard resident status)\n")
        return 2
    path.unlink(missing_ok=True)  # left by one that was killed
    _warm_up()
    stamp = code_stamp()
    srv = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    old_mask = os.umask(0o177)
    try:
        srv.bind(str(path))
    finally:
        os.umask(old_mask)
    mine = path.stat().st_ino
    srv.listen(16)
    idle = max(idle_minutes, 0.001) * 60
    last_work = time.monotonic()  # a status question is not work: it does not keep the resident up
    stopping = []
    signal.signal(signal.SIGTERM, lambda *_: stopping.append("term") or srv.close())
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    info = {"pid": os.getpid(), "since": int(time.time()), "served": 0, "idle_minutes": idle_minutes,
            "socket": str(path)}
    try:
        while not stopping:
            left = last_work + idle - time.monotonic()
            if left <= 0:
                break  # idle long enough
            srv.settimeout(left)
            try:
                conn, _ = srv.accept()
            except socket.timeout:
                break  # idle long enough
            except OSError:
                break  # closed by SIGTERM
            with conn:
                if _peer_uid(conn) != os.getuid():
                    continue
                try:
                    req = _recv(conn)
                except (OSError, ValueError):
                    continue
                if not req or req.get("protocol") != PROTOCOL:
                    continue
                op = req.get("op", "run")
                try:
                    if op == "status":
                        _send(conn, dict(info, running=True))
                    elif op == "stop":
                        _send(conn, {"stopped": True})
                        break
                    elif req.get("stamp") != stamp:
                        _send(conn, {"refused": "the caller's Blockyard differs from the resident's"})
                        if code_stamp() != stamp:
                            break  # its own files changed on disk (an upgrade): it is out of date
                        # else the caller is another installation: it runs the command itself
                    else:
                        reply = _run_request(req, run)
                        if not reply.get("refused"):
                            info["served"] += 1
                            last_work = time.monotonic()
                        _send(conn, reply)
                except OSError:
                    continue  # the caller went away
    finally:
        srv.close()
        try:
            if path.stat().st_ino == mine:  # not a newer resident's socket
                path.unlink()
        except OSError:
            pass
    return 0


