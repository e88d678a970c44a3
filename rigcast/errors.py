"""User-facing errors: one readable line on stderr and an exit code, never a traceback.

Every error a user can cause ends up here, once, as

    rigcast: error: <what is wrong> — <what to do>

Every error the product raises on purpose derives from ``rigcast.runtime.errors.RigcastError``,
which carries its advice and exit code (see that module for the codes), so a single isinstance
test turns any of them into its line. ZeroMQ and operating-system errors get their own lines here.
"""

from __future__ import annotations

import errno
import logging
import sys
from collections.abc import Callable
from typing import TextIO

from rigcast.runtime.errors import (
    EXIT_FAILURE,
    EXIT_INTERRUPTED,
    EXIT_OK,
    EXIT_USAGE,
    RigcastError,
)

__all__ = ["EXIT_FAILURE", "EXIT_INTERRUPTED", "EXIT_OK", "EXIT_USAGE", "MismatchError",
           "NoAnswerError", "UserError", "explain", "report", "run_guarded"]

log = logging.getLogger(__name__)


class UserError(RigcastError):
    """An error found by the CLI layer itself; carries its advice and exit code."""

    def __init__(self, what: str, todo: str = "", code: int = EXIT_FAILURE) -> None:
        super().__init__(what, advice=todo, exit_code=code)
        self.what = what
        self.todo = todo
        self.code = code


class MismatchError(UserError):
    """A take, a bundle or a server that were made for different rigs."""

    def __init__(self, what: str, todo: str = "") -> None:
        super().__init__(
            what,
            todo or "use the bundle built for this rig, or rebuild the bundle with `rigcast build`",
        )


class NoAnswerError(UserError):
    """A server that did not answer in time."""

    def __init__(self, what: str, todo: str = "") -> None:
        super().__init__(
            what, todo or "start one with `rigcast serve`, or check the endpoint you gave"
        )




def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _compose(what: str, todo: str) -> str:
    what = _one_line(what).rstrip(".")
    if not todo or " — " in what:
        return what
    return f"{what} — {todo}"


def _zmq_line(exc: BaseException) -> tuple[str, int] | None:
    zmq = sys.modules.get("zmq")
    if zmq is None or not isinstance(exc, zmq.ZMQError):
        return None
    code = getattr(exc, "errno", None)
    if code == errno.EADDRINUSE:
        return (
            _compose(
                f"address already in use ({exc})",
                "another server (maybe another rigcast) holds that port; pick another port "
                "or stop the other process",
            ),
            EXIT_FAILURE,
        )
    if code in (errno.EINVAL, errno.ENODEV, errno.EPROTONOSUPPORT, errno.EADDRNOTAVAIL):
        return (
            _compose(
                f"bad endpoint ({exc})",
                "write endpoints as tcp://HOST:PORT, e.g. tcp://127.0.0.1:5701",
            ),
            EXIT_USAGE,
        )
    return _compose(f"network error ({exc})", "check the endpoints and retry"), EXIT_FAILURE


def _os_line(exc: OSError) -> tuple[str, int]:
    name = exc.filename
    reason = exc.strerror or str(exc)
    if isinstance(exc, FileNotFoundError):
        what = f"{name}: no such file or directory" if name else _one_line(str(exc))
        return _compose(what, "check the path"), EXIT_FAILURE
    if isinstance(exc, PermissionError):
        return _compose(f"{name}: permission denied", "check the file's permissions"), EXIT_FAILURE
    if isinstance(exc, IsADirectoryError | NotADirectoryError):
        return _compose(f"{name}: {reason.lower()}", "check the path"), EXIT_FAILURE
    what = f"{name}: {reason}" if name else reason
    return _compose(what, "check the path and the disk"), EXIT_FAILURE


def explain(exc: BaseException) -> tuple[str, int] | None:
    """The one line (without the ``rigcast: error:`` prefix) and exit code for a known error.

    Returns None for anything else: an unknown exception is a bug and keeps its traceback.
    """
    if isinstance(exc, RigcastError):
        return _compose(str(exc), exc.advice), exc.exit_code
    zmq_line = _zmq_line(exc)
    if zmq_line is not None:
        return zmq_line
    if isinstance(exc, OSError):
        return _os_line(exc)
    return None


def report(line: str, stream: TextIO | None = None) -> None:
    """Write one error line to stderr."""
    out = stream if stream is not None else sys.stderr
    out.write(f"rigcast: error: {line}\n")
    out.flush()


def run_guarded(action: Callable[[], int]) -> int:
    """Run a subcommand and turn every known error into one line and an exit code."""
    try:
        return action()
    except KeyboardInterrupt:
        sys.stderr.write("rigcast: interrupted\n")
        return EXIT_INTERRUPTED
    except Exception as exc:
        explained = explain(exc)
        if explained is None:
            raise
        line, code = explained
        log.debug("error shown to the user", exc_info=True)
        report(line)
        return code
