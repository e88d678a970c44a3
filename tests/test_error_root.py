"""One error root (issue 16): every exception class the product defines derives from
``rigcast.runtime.errors.RigcastError``, which carries the advice and the exit code, and the CLI
turns any of them into one line without a list of names."""

from __future__ import annotations

import importlib
import inspect
import pickle
import pkgutil

import pytest
import rigcast.export
import rigcast.runtime
from rigcast.export.rigs.rig import RigError
from rigcast.runtime.bundle import BundleError
from rigcast.runtime.errors import EXIT_FAILURE, EXIT_USAGE, RigcastError
from rigcast.runtime.messaging.sockets import BindError

import rigcast
from rigcast import errors
from rigcast.readers.takes import TakeError

# Classes whose files belong to others this session: each needs a one-line change of its bases
# in its own file (e.g. `class ConfigError(RigcastError, ValueError):`). The test fails when one
# of them derives from the root, so that this list can only shrink.
NOT_YET_ROOTED: set[str] = set()  # every class derives from the root now


def product_modules() -> list[str]:
    """Every module of the three packages (rigcast's own __main__ runs the CLI: left out)."""
    names = set()
    for pkg in (rigcast, rigcast.runtime, rigcast.export):
        names.add(pkg.__name__)
        for info in pkgutil.walk_packages(pkg.__path__, pkg.__name__ + "."):
            if not info.name.endswith(".__main__"):
                names.add(info.name)
    return sorted(names)


def exception_classes() -> dict[str, type[BaseException]]:
    """'module.Class' -> class, for every exception class a product module defines."""
    found: dict[str, type[BaseException]] = {}
    for name in product_modules():
        module = importlib.import_module(name)
        for attr, obj in vars(module).items():
            if inspect.isclass(obj) and issubclass(obj, BaseException) \
                    and obj.__module__ == name:
                found[f"{name}.{attr}"] = obj
    return found


def test_every_product_exception_derives_from_the_root() -> None:
    classes = exception_classes()
    assert len(classes) >= 30, sorted(classes)  # the walk really found the product's errors
    outside = {name for name, cls in classes.items() if not issubclass(cls, RigcastError)}
    assert outside - NOT_YET_ROOTED == set(), "exceptions outside the root"
    assert NOT_YET_ROOTED - outside == set(), "these derive from the root now: drop them here " \
        "and from rigcast/errors.py's _NOT_YET_ROOTED"
    assert not hasattr(errors, "_NOT_YET_ROOTED"), "no registry of names is left"


# Records of figures named like exceptions, still to be renamed (none left).
RECORDS_NAMED_AS_ERRORS: set[str] = set()


def test_no_result_record_is_named_like_an_error() -> None:
    """Records of error figures are not exceptions (issue 16): a class named *Error is one."""
    misnamed = set()
    for name in product_modules():
        module = importlib.import_module(name)
        for attr, obj in vars(module).items():
            if inspect.isclass(obj) and obj.__module__ == name and attr.endswith("Error") \
                    and not issubclass(obj, BaseException):
                misnamed.add(f"{name}.{attr}")
    assert misnamed == RECORDS_NAMED_AS_ERRORS
    from rigcast.export.quality import metrics

    assert not hasattr(metrics, "VertexError") and not hasattr(metrics, "ControlError")
    assert {"VertexErrorStats", "ControlErrorStats"} <= set(metrics.__all__)


def test_one_take_error() -> None:
    """The take readers' TakeError is the only one; synthetic takes raise SynthError."""
    classes = exception_classes()
    takes = [name for name in classes if name.endswith(".TakeError")]
    assert takes == ["rigcast.readers.take_common.TakeError"]
    from rigcast.export.quality.take_synth import SynthError

    assert SynthError.exit_code == EXIT_USAGE


@pytest.mark.parametrize(("exc", "code", "advice"), [
    (BundleError("b.rcb: not a rigcast bundle"), EXIT_FAILURE, "rebuild the bundle"),
    (RigError("gltf:x.glb: no controls"), EXIT_USAGE, "check the rig spec"),
    (TakeError("t.npz: no frames"), EXIT_FAILURE, "check the take's path"),
    (BindError("tcp://127.0.0.1:5701 is in use"), EXIT_FAILURE, "pick another port"),
    (errors.UserError("no such stream", "list them", 2), EXIT_USAGE, "list them"),
])
def test_the_cli_line_comes_from_the_class(exc: RigcastError, code: int, advice: str) -> None:
    line, exit_code = errors.explain(exc) or ("", -1)
    assert exit_code == code and line.startswith(f"{exc} — ") and advice in line
    assert "\n" not in line


def test_a_raise_can_override_advice_and_code_and_both_survive_pickling() -> None:
    """Worker processes send errors back pickled (export/data/executor.py, Dask)."""
    exc = RigError("proc:foo: exited with 3", advice="run the command by hand", exit_code=1)
    back = pickle.loads(pickle.dumps(exc))
    assert (str(back), back.advice, back.exit_code) == (str(exc), "run the command by hand", 1)
    assert errors.explain(back) == ("proc:foo: exited with 3 — run the command by hand", 1)
    assert RigError("x").advice == RigError.advice  # the override did not leak into the class


def test_unknown_exceptions_stay_tracebacks() -> None:
    assert errors.explain(KeyError("bug")) is None
    assert errors.explain(ValueError("bug")) is None
