"""The registry of step kinds.

A step kind is one frozen pydantic parameter model, one pure function and a
version string, registered by the :func:`step` decorator::

    @step("invert", params=InvertParams, takes=["mask"], gives="mask", version="1")
    def invert(params, mask, *, spacing):
        ...

The function is called as ``func(params, *inputs, spacing=spacing)`` where

* ``params`` is an instance of the parameter model whose lengths and areas have
  already been resolved to pixels (``params.radius.px``),
* ``inputs`` are numpy arrays (``image``, ``mask``, ``labels``) or
  :class:`~lotproof.steps._data.Table` objects, in the order of the recipe's ``to:``,
* ``spacing`` is the physical size of one pixel along each array axis, in
  micrometres (``(dy, dx)`` in 2D, ``(dz, dy, dx)`` in 3D).

It returns its data, or an :class:`~lotproof.steps._data.Output` when it also reports
named values (a threshold level, per-image measurements). It must not read or
write files, keep state between calls, or look at the clock.

Nothing here is 2D-specific: a kind declares the array dimensions it supports.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from pydantic import BaseModel, ConfigDict

__all__ = [
    "DATA_KINDS",
    "REGISTRY",
    "SAME",
    "StepKind",
    "StepParams",
    "get_kind",
    "step",
]

#: The kinds of data that flow between steps.
DATA_KINDS: tuple[str, ...] = ("image", "mask", "labels", "table", "values")

#: ``gives=SAME``: the step gives the kind of data its first input is.
SAME = "same"


class StepParams(BaseModel):
    """Base of every step's parameter model: frozen, unknown keys forbidden."""

    model_config = ConfigDict(frozen=True, extra="forbid", strict=False)


@dataclass(frozen=True)
class StepKind:
    """Everything the runner needs to know about one kind of step."""

    name: str
    params: type[StepParams]
    func: Callable[..., Any]
    version: str
    #: accepted data kinds per input position
    takes: tuple[frozenset[str], ...]
    #: a data kind, or :data:`SAME`
    gives: str
    #: the last entry of ``takes`` may repeat (``combine`` takes two or more masks)
    variadic: bool = False
    #: named values the step reports: name -> unit (``"-"`` for dimensionless)
    values: Mapping[str, str] = field(default_factory=dict)
    #: array dimensions the step supports
    ndims: frozenset[int] = frozenset({2})
    #: colour (RGB) images are accepted (only ``gray``)
    accepts_color: bool = False
    #: distributions whose versions enter the cache key of this step's results
    libraries: tuple[str, ...] = ("numpy",)
    #: one-line definition of each value (shown by ``lotproof steps KIND``)
    definitions: Mapping[str, str] = field(default_factory=dict)
    #: table columns the step gives: name -> (unit, definition)
    columns: Mapping[str, tuple[str, str]] = field(default_factory=dict)
    #: ``degenerate(params, ndim)``: why these parameters (resolved to pixels) would make
    #: the step change nothing, or give a constant, on ``ndim``-D data; None when they
    #: do not. A step that silently does nothing is how a failing lot passes.
    degenerate: Callable[[Any, int], str | None] | None = None

    def degenerate_reason(self, params: Any, ndim: int) -> str | None:
        """:attr:`degenerate` of ``params`` on ``ndim``-D data (None for kinds without one)."""
        return None if self.degenerate is None else self.degenerate(params, ndim)

    @property
    def summary(self) -> str:
        """One line of documentation: the first line of the function's docstring."""
        doc = inspect.getdoc(self.func) or ""
        return doc.strip().splitlines()[0] if doc.strip() else ""

    def input_count_ok(self, n: int) -> bool:
        if self.variadic:
            return n >= len(self.takes)
        return n == len(self.takes)

    def accepted(self, position: int) -> frozenset[str]:
        """The data kinds accepted at input ``position``."""
        if position < len(self.takes):
            return self.takes[position]
        return self.takes[-1]

    def output_kind(self, input_kinds: Sequence[str]) -> str:
        if self.gives == SAME:
            return input_kinds[0]
        return self.gives


REGISTRY: dict[str, StepKind] = {}


def step(
    name: str,
    *,
    params: type[StepParams],
    takes: Sequence[str | Sequence[str]],
    gives: str,
    version: str,
    variadic: bool = False,
    values: Mapping[str, str] | None = None,
    ndims: Sequence[int] = (2,),
    accepts_color: bool = False,
    libraries: Sequence[str] = ("numpy",),
    definitions: Mapping[str, str] | None = None,
    columns: Mapping[str, tuple[str, str]] | None = None,
    degenerate: Callable[[Any, int], str | None] | None = None,
) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    """Register ``func`` as the step kind ``name`` (see the module docstring)."""
    accepted = tuple(frozenset([t]) if isinstance(t, str) else frozenset(t) for t in takes)
    for kinds in accepted:
        unknown = kinds - set(DATA_KINDS)
        if unknown:
            raise ValueError(f"step {name!r}: unknown data kind(s) {sorted(unknown)}")
    if gives != SAME and gives not in DATA_KINDS:
        raise ValueError(f"step {name!r}: unknown data kind {gives!r}")
    if not accepted:
        raise ValueError(f"step {name!r} must take at least one input")

    def register(func: Callable[..., Any]) -> Callable[..., Any]:
        if name in REGISTRY:
            raise ValueError(f"step kind {name!r} is registered twice")
        REGISTRY[name] = StepKind(
            name=name,
            params=params,
            func=func,
            version=version,
            takes=accepted,
            gives=gives,
            variadic=variadic,
            values=dict(values or {}),
            ndims=frozenset(ndims),
            accepts_color=accepts_color,
            libraries=tuple(libraries),
            definitions=dict(definitions or {}),
            columns=dict(columns or {}),
            degenerate=degenerate,
        )
        return func

    return register


def get_kind(name: str) -> StepKind:
    """The registered step kind ``name`` (``KeyError`` if there is none)."""
    return REGISTRY[name]
