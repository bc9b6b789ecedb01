"""matplotlib drawn the same on every machine: its own defaults, never the user's settings.

The report's plots and the preview sheet are drawn inside :func:`default_style`,
which starts from matplotlib's built-in defaults (``rcParamsDefault``, not the
user's ``matplotlibrc`` or anything a notebook changed) and applies only the
settings given. Figures are made with :class:`matplotlib.figure.Figure` and a
canvas of their own: pyplot and its global backend are never touched.

:data:`PNG_METADATA` and :data:`SVG_METADATA` leave out the fields that would
differ between machines or runs (the matplotlib version, a date), so the same
drawing gives the same bytes.
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from matplotlib.typing import RcKeyType

__all__ = ["PNG_METADATA", "SVG_METADATA", "default_style"]

#: ``savefig(metadata=...)`` for PNG: no "Software" text chunk naming the matplotlib version
PNG_METADATA: dict[str, Any] = {"Software": None}
#: ``savefig(metadata=...)`` for SVG: no date, no creator naming the matplotlib version
SVG_METADATA: dict[str, Any] = {"Date": None, "Creator": None}


@contextmanager
def default_style(settings: Mapping[RcKeyType, Any] | None = None) -> Iterator[None]:
    """Within the block, matplotlib's own defaults plus ``settings``; the caller's afterwards."""
    import matplotlib

    with matplotlib.rc_context():
        matplotlib.rcParams.update(matplotlib.rcParamsDefault)
        if settings:
            matplotlib.rcParams.update(settings)
        yield
