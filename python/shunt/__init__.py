"""Audit the residual structure of exported ONNX models from Python.

Every function runs the same program as the ``shunt`` command, in this
process, and returns the documented JSON document of that command as a
Python ``dict`` (the schemas are in ``docs/formats.md`` of the repository):

* :func:`scan` -- the residual blocks of a model, without running it
  (``shunt/report``);
* :func:`audit` -- the scan, then a seeded CPU run that measures every block
  (``shunt/report``); inputs may be numpy arrays;
* :func:`pin` and :func:`verify` -- record a model's residual structure, then
  check a model against it (``shunt/verify``);
* :func:`compare` -- two models block by block (``shunt/compare``).

Bad input (a missing or malformed file, an unknown option, a model that
cannot run) raises :class:`ShuntError` with the one-line message the command
prints. A gate that fails (``fail_on`` findings, a verification or comparison
that does not match) is not an error: the document says so, and
:func:`run` gives the exit code.

Random-input statistics describe how signals flow through the network, not
its accuracy or safety.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path
from typing import Any, Dict, Iterable, List, Mapping, Optional, Sequence, Union

from . import _native

__all__ = [
    "ShuntError",
    "audit",
    "compare",
    "pin",
    "run",
    "scan",
    "verify",
    "__version__",
]

__version__: str = _native.version()

PathLike = Union[str, "os.PathLike[str]"]
Inputs = Union["numpy.ndarray", Mapping[str, "numpy.ndarray"]]  # noqa: F821


class ShuntError(Exception):
    """A command that shunt refused or could not complete (its exit code 2).

    ``str(error)`` is the one-line message the ``shunt`` command prints after
    ``shunt: error:``; it names the file and the problem. ``internal`` is true
    when the cause is a bug (a caught panic) rather than the input.
    """

    def __init__(self, message: str, internal: bool = False) -> None:
        super().__init__(message)
        self.message = message
        self.internal = internal


def run(*args: Union[str, PathLike]) -> int:
    """Runs ``shunt ARGS...`` in this process and returns its exit code.

    Output goes where the arguments say (standard output, or ``--output``);
    errors are printed on standard error as the command prints them.
    """
    return _native.main(["shunt", *map(os.fspath, args)])


def _call(args: Sequence[str]) -> int:
    code, error, internal = _native.run(["shunt", *args])
    if code == 2:
        raise ShuntError(error or "unknown error", internal)
    return code


def _document(args: Sequence[str]) -> Dict[str, Any]:
    with tempfile.TemporaryDirectory(prefix="shunt-") as tmp:
        out = os.path.join(tmp, "document.json")
        _call([*args, "--format", "json", "--output", out])
        with open(out, encoding="utf-8") as f:
            return json.load(f)


def _limits(fail_on: Optional[Iterable[str]]) -> List[str]:
    return ["--fail-on", ",".join(fail_on)] if fail_on else []


def scan(model: PathLike, *, fail_on: Optional[Iterable[str]] = None) -> Dict[str, Any]:
    """The residual structure of ``model`` (an ``.onnx`` file or a folder of them).

    Returns the ``shunt/report`` document (``shunt/batch`` for a folder):
    ``blocks`` (one per residual block: stage, merge, shortcut kind,
    placement, branch), ``summary`` and ``findings``. Nothing is run.
    """
    return _document(["scan", os.fspath(model), "--quiet", *_limits(fail_on)])


def _run_options(
    inputs: Optional[Inputs],
    samples: Optional[int],
    seed: Optional[int],
    dims: Optional[Mapping[str, int]],
    shapes: Optional[Mapping[str, Sequence[int]]],
    fills: Optional[Mapping[str, float]],
    tmp: str,
) -> List[str]:
    args: List[str] = []
    if samples is not None:
        args += ["--batch", str(int(samples))]
    if seed is not None:
        args += ["--seed", str(int(seed))]
    for name, value in (dims or {}).items():
        args += ["--dim", f"{name}={int(value)}"]
    for name, shape in (shapes or {}).items():
        args += ["--input", f"{name}=" + "x".join(str(int(d)) for d in shape)]
    for name, value in (fills or {}).items():
        args += ["--fill", f"{name}={float(value)!r}"]
    if inputs is not None:
        args += ["--feed", _write_feed(inputs, tmp)]
    return args


def _write_feed(inputs: Inputs, tmp: str) -> str:
    """Writes numpy inputs where the program reads them: one array as ``.npy``
    (a model with one input), several as an uncompressed ``.npz`` keyed by
    input name. The first axis of every array is the sample axis."""
    import numpy as np

    if isinstance(inputs, Mapping):
        path = os.path.join(tmp, "inputs.npz")
        arrays = {str(k): np.ascontiguousarray(v) for k, v in inputs.items()}
        np.savez(path, **arrays)
    else:
        path = os.path.join(tmp, "inputs.npy")
        np.save(path, np.ascontiguousarray(inputs))
    return path


def audit(
    model: PathLike,
    *,
    inputs: Optional[Inputs] = None,
    samples: Optional[int] = None,
    seed: Optional[int] = None,
    dims: Optional[Mapping[str, int]] = None,
    shapes: Optional[Mapping[str, Sequence[int]]] = None,
    fills: Optional[Mapping[str, float]] = None,
    knockout: bool = False,
    gain: bool = False,
    run: bool = True,
    fail_on: Optional[Iterable[str]] = None,
    options: Sequence[str] = (),
) -> Dict[str, Any]:
    """Scans ``model``, runs it on the CPU and measures every residual block.

    ``inputs`` are real inputs: one numpy array for a one-input model, or a
    mapping from input name to array; the first axis is the sample axis.
    Without them, inputs are drawn from a seeded generator (``seed``,
    ``samples``; ``dims`` sets symbolic dimensions, ``shapes`` whole input
    shapes, ``fills`` constant inputs). ``knockout`` and ``gain`` add the
    influence measurements; ``run=False`` is the structural audit only.
    ``options`` are further command-line options of ``shunt audit``
    (thresholds, limits), passed as they are.

    Returns the ``shunt/report`` document with per-block ``stats`` and the
    ``findings``. Raises :class:`ShuntError` when the model cannot be read
    or run.
    """
    with tempfile.TemporaryDirectory(prefix="shunt-feed-") as tmp:
        args = ["audit", os.fspath(model), "--quiet", *_limits(fail_on)]
        if run:
            args += _run_options(inputs, samples, seed, dims, shapes, fills, tmp)
        else:
            args.append("--no-run")
        if knockout:
            args.append("--knockout")
        if gain:
            args.append("--gain")
        return _document([*args, *options])


def pin(model: PathLike, path: Optional[PathLike] = None) -> str:
    """Records the residual structure of ``model`` (no statistics, no node
    names) and returns the pin file's text (TOML); writes it to ``path`` too
    when given. Check a model against it with :func:`verify`."""
    with tempfile.TemporaryDirectory(prefix="shunt-") as tmp:
        out = os.path.join(tmp, "pin.toml")
        _call(["pin", os.fspath(model), "--output", out])
        text = Path(out).read_text(encoding="utf-8")
    if path is not None:
        Path(path).write_text(text, encoding="utf-8")
    return text


def verify(
    model: PathLike,
    *,
    pin: Optional[PathLike] = None,
    expect: Optional[PathLike] = None,
) -> Dict[str, Any]:
    """Checks ``model`` against a pin file (from :func:`pin`) or a hand-written
    expectation file. Returns the ``shunt/verify`` document; its
    ``differences`` list is empty when the model matches."""
    if (pin is None) == (expect is None):
        raise ValueError("verify takes exactly one of pin= or expect=")
    flag, file = ("--pin", pin) if pin is not None else ("--expect", expect)
    return _document(["verify", os.fspath(model), flag, os.fspath(file)])


def compare(
    a: PathLike,
    b: PathLike,
    *,
    run: bool = True,
    max_rel_l2: Optional[float] = None,
    options: Sequence[str] = (),
) -> Dict[str, Any]:
    """Compares two models block by block: aligns their residual blocks, says
    which changed in structure and, unless ``run=False``, runs both on the
    same seeded inputs and compares each block's ratio and the outputs.
    Returns the ``shunt/compare`` document; ``failures`` is empty on a
    match."""
    args = ["compare", os.fspath(a), os.fspath(b)]
    if not run:
        args.append("--no-run")
    if max_rel_l2 is not None:
        args += ["--max-rel-l2", repr(float(max_rel_l2))]
    return _document([*args, *options])
