"""Before/after change figures of one step, computed once and rendered wherever they are shown.

``bench compare`` prints one line per step and writes the same line at the top of
``compare.html``; the step's section on the page repeats the parts it details (the map change
of a grid step). All of them are rendered from one :class:`StepChange`, so the terminal, the
summary and the section it heads cannot disagree. Changes are after minus before, in dB:
negative is lower emission.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["ChangeExtremes", "Extreme", "KindComparison", "StepChange"]


@dataclass(frozen=True)
class Extreme:
    """One extreme change: ``delta_db`` (after minus before, dB) and where it is, as text."""

    delta_db: float
    where: str

    def text(self) -> str:
        """``"-8.7 dB at x = 95.0 mm, y = 20.0 mm"``."""
        return f"{self.delta_db:+.1f} dB at {self.where}"


@dataclass(frozen=True)
class ChangeExtremes:
    """The largest improvement and the largest increase over one set of compared values.

    Attributes
    ----------
    title : str
        What was compared, e.g. ``"matched suspects"``, ``"combined map"``.
    count : int
        How many values were compared (finite changes).
    noun : str
        What one value is, singular: ``"suspect"``, ``"peak"``, ``"position"``.
    improvement, increase : Extreme or None
        The most negative and the most positive change, None when no change rounds (to the
        0.1 dB shown) below, respectively above, zero.
    """

    title: str
    count: int
    noun: str
    improvement: Extreme | None
    increase: Extreme | None

    @classmethod
    def of(cls, title: str, noun: str, delta_db, where) -> "ChangeExtremes | None":
        """Extremes of ``delta_db`` (dB) whose places are ``where`` (texts); None if none is finite."""
        delta = np.asarray(delta_db, float).ravel()
        keep = np.flatnonzero(np.isfinite(delta))
        if keep.size == 0:
            return None
        # ties (to a micro-dB: float noise) go to the first place, so equal changes name the same
        rounded = np.round(delta[keep], 6)
        low, high = int(keep[np.argmin(rounded)]), int(keep[np.argmax(rounded)])
        improvement = Extreme(float(delta[low]), where[low]) if round(delta[low], 1) < 0 else None
        increase = Extreme(float(delta[high]), where[high]) if round(delta[high], 1) > 0 else None
        return cls(title, int(keep.size), noun, improvement, increase)

    def text(self) -> str:
        """``"combined map (357 positions): largest improvement -8.7 dB at ..., no increase"``."""
        if self.improvement is None and self.increase is None:
            body = "no change"
        else:
            body = ", ".join([
                f"largest improvement {self.improvement.text()}" if self.improvement
                else "no improvement",
                f"largest increase {self.increase.text()}" if self.increase else "no increase"])
        plural = "" if self.count == 1 else "s"
        return f"{self.title} ({self.count} {self.noun}{plural}): {body}"


@dataclass(frozen=True)
class KindComparison:
    """What a step kind adds to a comparison: its change figures and its HTML.

    The kind renders its HTML from the same :class:`ChangeExtremes` it returns, which join the
    step's summary line.
    """

    changes: tuple[ChangeExtremes, ...] = ()
    html: tuple[str, ...] = ()


@dataclass(frozen=True)
class StepChange:
    """The comparison of one step, summarised: the one source of every summary text.

    Attributes
    ----------
    label, kind : str
        The step.
    changes : tuple of ChangeExtremes
        Matched suspects, spectrum peaks, then the kind's own (a grid step's map), those that
        exist.
    counts : (int, int, int) or None
        Suspects matched, new, vanished; None when neither run has result rows.
    """

    label: str
    kind: str
    changes: tuple[ChangeExtremes, ...]
    counts: tuple[int, int, int] | None = None

    def line(self) -> str:
        """The summary line, the same on the terminal and at the top of the page."""
        texts = [c.text() for c in self.changes] or ["no emissions to compare"]
        if self.counts is not None:
            matched, new, vanished = self.counts
            texts.append(f"suspects matched {matched}, new {new}, vanished {vanished}")
        return f"{self.label}: " + "; ".join(texts)
