"""Compiled kernels called straight at their compiled code, past numba's per-call type look-up.

A call through a numba dispatcher works out the types of all its arguments on every call
and looks the compiled version up by them; only then are the arguments unboxed and the
machine code run. The tracker calls the same kernels with the same argument types on
every fix (the tree step three times a fix, the live answer, the commit check), so that
look-up is repeated work: on an 11-argument call about 0.4-0.7 µs of some 1.4-1.8
(a throwaway loop over an empty 11-argument kernel, this machine, loaded).

:class:`Direct` holds, per kernel, the compiled version's own entry point
(``Dispatcher.compile(signature)`` answers it, compiling or loading numba's disk cache
when needed): the same machine code the dispatcher would run, with the same unboxing of
each argument. The signature is fixed once, at the first call: array arguments by their
own numba type (dtype, dimensions, layout), numbers by the kernel's annotations
(``int`` -> int64, ``float`` -> float64, ``bool`` -> boolean): an int passed for a
``float`` parameter is converted, as the dispatcher's float64 version would convert it
(a float passed for an ``int`` parameter would be truncated: the callers pass none).

The entry point checks no types: a caller must pass arrays of the same dtype, number of
dimensions and layout on every call (the tracker's arrays are all made by numpy with
fixed dtypes, contiguous and writable: :func:`resolved` refuses a first call that is
not, and the dispatcher then stays in use). Pure: no I/O; the one piece of state is the
cache of resolved entry points, which changes no result.

A kernel compiled ahead of time (:mod:`livematch.core._jit`) is a plain C function with
its signature fixed at build time: :class:`Direct` calls it as it is, and numba is not
imported.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

import numpy as np

#: numba scalar types (by name) for the annotations the kernels use on their number arguments
_SCALARS = {"int": "int64", "float": "float64", "bool": "boolean"}


def signature(dispatcher: Any, args: tuple[Any, ...]) -> tuple[Any, ...] | None:
    """The numba signature :class:`Direct` fixes for ``dispatcher`` called with ``args``.

    None when a call with these arguments must keep going through the dispatcher: an
    array that is not C-contiguous and writable, a number whose parameter has no
    ``int`` / ``float`` / ``bool`` annotation, or another kind of argument.
    """
    import numba

    func = dispatcher.py_func
    code = func.__code__
    if code.co_argcount != len(args):
        return None
    names = code.co_varnames[:code.co_argcount]  # the parameters, in order
    notes = func.__annotations__
    sig: list[Any] = []
    for name, a in zip(names, args, strict=True):
        if isinstance(a, np.ndarray):
            if not (a.flags.c_contiguous and a.flags.writeable):
                return None
            sig.append(numba.typeof(a))
        elif isinstance(a, bool | int | float):
            ann = notes.get(name, "")
            kind = _SCALARS.get(ann if isinstance(ann, str) else getattr(ann, "__name__", ""))
            if kind is None:
                return None
            sig.append(getattr(numba.types, kind))
        else:
            return None
    return tuple(sig)


def resolved(dispatcher: Any, args: tuple[Any, ...]) -> Callable[..., Any] | None:
    """The entry point of ``dispatcher``'s compiled version for ``args``' types, or None.

    Compiles (or loads from numba's disk cache) that version if the dispatcher has not
    got it yet. None when :func:`signature` refuses the arguments.
    """
    sig = signature(dispatcher, args)
    if sig is None:
        return None
    entry: Callable[..., Any] = dispatcher.compile(sig)
    return entry


class Direct:
    """Kernels by name, each called through the dispatcher once, then at its entry point.

    ``Direct(tree_sweep=tree_sweep)``: ``calls.tree_sweep(...)`` makes the first call
    through a resolver that fixes the signature (:func:`resolved`), replaces the
    attribute by the entry point and calls it; later calls go straight there. A first
    call whose arguments :func:`signature` refuses goes through the dispatcher, and so
    do all later calls (no look-up is saved, none is repeated).
    """

    def __init__(self, **kernels: Any) -> None:
        for name, dispatcher in kernels.items():
            # (compiled ahead of time: no dispatcher, the C function is the entry point)
            setattr(self, name, self._resolver(name, dispatcher)
                    if hasattr(dispatcher, "py_func") else dispatcher)

    def _resolver(self, name: str, dispatcher: Any) -> Callable[..., Any]:
        def first(*args: Any) -> Any:
            entry = resolved(dispatcher, args)
            # (refused: the dispatcher from now on, which checks the types of every call)
            setattr(self, name, dispatcher if entry is None else entry)
            return dispatcher(*args) if entry is None else entry(*args)

        return first

    if TYPE_CHECKING:  # (for mypy: the kernels are set at run time)
        # Only for the type checker: a class with ``__getattr__`` has every attribute
        # looked up through a slower hook (``slot_tp_getattr_hook``), kernels included.
        def __getattr__(self, name: str) -> Any: ...
