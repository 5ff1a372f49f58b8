"""Progress bars for long work: tqdm on stderr, or nothing.

The library never decides on its own to draw: a function that can take long (a frontier,
the fallout economics) takes ``progress=True`` from its caller; the command line passes
``sys.stderr.isatty()``, so a bar (with tqdm's estimate of the time left) is drawn on a
terminal and nothing at all goes to a pipe or a file, and never to stdout.
"""

from __future__ import annotations

import sys

__all__ = ["progress_bar"]


class _Silent:
    """The stand-in when no bar is wanted: every call does nothing."""

    total = 0
    done = 0

    def update(self, n: int = 1) -> None:
        pass

    def grow(self, n: int) -> None:
        pass

    def describe(self, text: str) -> None:
        pass

    def close(self) -> None:
        pass


class _Bar:
    """A tqdm bar on stderr that can be told of more work than first thought."""

    def __init__(self, total: int, desc: str, unit: str, delay: float, tick: float | None):
        from tqdm import tqdm

        self._bar = tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, delay=delay,
                         leave=False, dynamic_ncols=True)
        self._stop = None
        if tick:
            # steps of seconds to minutes: redraw every ``tick`` seconds so that the elapsed
            # time keeps moving while one step runs (tqdm redraws only on updates)
            import threading

            self._stop = threading.Event()
            threading.Thread(target=self._redraw, args=(tick,), daemon=True).start()

    def _redraw(self, tick: float) -> None:
        while not self._stop.wait(tick):
            self._bar.refresh()

    @property
    def total(self) -> int:
        return int(self._bar.total or 0)

    @property
    def done(self) -> int:
        return int(self._bar.n)

    def update(self, n: int = 1) -> None:
        if self._bar.n + n > self.total:  # more steps than planned: keep the estimate honest
            self.grow(self._bar.n + n - self.total)
        self._bar.update(n)

    def grow(self, n: int) -> None:
        self._bar.total = self.total + int(n)
        self._bar.refresh()

    def describe(self, text: str) -> None:
        """Show ``text`` (say, the model being solved) after the counts."""
        self._bar.set_postfix_str(text, refresh=True)

    def close(self) -> None:
        if self._stop is not None:
            self._stop.set()
        self._bar.close()


def progress_bar(total: int, *, desc: str, unit: str = "point", enabled: bool = True,
                 slow: bool = False):
    """A progress bar on stderr for ``total`` steps, or a silent stand-in.

    Parameters
    ----------
    total : int
        Steps planned (the bar grows when more are reported).
    desc : str
        What is being done, shown before the bar.
    unit : str
        What one step is.
    enabled : bool
        False (or ``total`` ≤ 0) gives the silent stand-in.
    slow : bool
        Steps that may each take seconds (a mixed-integer point): the bar is drawn at once,
        so that there is something to see before the first step ends, and redrawn every
        second so that its elapsed time moves during a long step. Otherwise it appears only
        when the work has run for a second (no flicker for quick work).

    Returns
    -------
    object
        With ``update(n)``, ``grow(n)`` (n < 0 drops planned steps), ``describe(text)``,
        ``close()`` and the counts ``total`` and ``done``.
    """
    if not enabled or total <= 0:
        return _Silent()
    return _Bar(int(total), desc, unit, 0.0 if slow else 1.0, 1.0 if slow else None)
