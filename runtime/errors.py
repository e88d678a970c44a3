"""The root of every error rigcast raises on purpose, with the exit code and the advice a user sees.

Each module keeps its own narrow type (``BundleError``, ``RigError``, ``TakeError``, ...), and every
one of them derives from ``RigcastError``; a type says once, as class attributes, what a user
should do about it (``advice``) and how the command exits (``exit_code``). A raise may override
either for one case. The entry points (``rigcast/errors.py`` for the CLI, ``serve_main`` for the
bare server) then turn any ``RigcastError`` into one line, ``<message> — <advice>``, and its exit
code, without a list of the types. tests/test_error_root.py walks the packages to check that every
exception class derives from this root.

Exit codes (documented in ``rigcast --help``): ``0`` success; ``1`` the work failed (a missing or
unreadable file, a corrupt bundle, a take or a server that does not match the bundle's rig, a port
in use, a server that does not answer); ``2`` usage (bad arguments, a bad config, a bad rig spec
or control schema); ``130`` interrupted with Ctrl-C.

This module imports nothing from rigcast, so every module can import it.
"""

from __future__ import annotations

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_USAGE = 2
EXIT_INTERRUPTED = 130


class RigcastError(Exception):
    """An error rigcast raises on purpose: its message names the bad value, ``advice`` says what
    to do, ``exit_code`` is the CLI's exit status. Subclasses set both as class attributes."""

    advice: str = ""
    exit_code: int = EXIT_FAILURE

    def __init__(self, *args: object, advice: str | None = None,
                 exit_code: int | None = None) -> None:
        super().__init__(*args)
        if advice is not None:
            self.advice = advice
        if exit_code is not None:
            self.exit_code = exit_code
