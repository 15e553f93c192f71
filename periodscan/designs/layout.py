"""How views show a design's windows, declared by the design so views never ask which it is."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Layout:
    """Presentation facts of one design.

    ``axis`` is the table column the sensitivity curve's x axis uses ("start" for window
    designs, "until" for the removal design, computed as start + length); ``per_length`` says
    whether the curve has one line per deficit length (window designs) or one line in all.
    ``variant_axis`` names what a sweep of deficit variants varies ("deficit", or "Blur sigma"
    for severity levels); "" when every window trains the config's deficit.
    ``correction`` says how the verdicts are corrected over ``family_words``.
    """

    axis: str = "start"
    axis_title: str = "window start (epoch)"
    per_length: bool = True
    family_words: str = "the windows of each length"
    plannable: bool = True
    label_format: str = "[{start}, {end})"
    line_format: str = "{length}-epoch deficit"
    variant_axis: str = ""
    #: How verdicts are corrected for multiplicity, as the words before ``family_words``.
    correction: str = "Holm-corrected over"
    #: Title of the bounds the verdicts rest on.
    bounds_title: str = "Holm bounds"

    def window_label(self, start: int, length: int) -> str:
        """'[10, 25)' for a window, 'until 25' for a removal run."""
        return self.label_format.format(start=int(start), length=int(length),
                                        end=int(start) + int(length))

    def x_value(self, start: int, length: int) -> int:
        """Where a window sits on the curve's x axis."""
        return int(start) + int(length) if self.axis == "until" else int(start)

    def line_label(self, length: int) -> str:
        return self.line_format.format(length=int(length))


WINDOW = Layout()
REMOVAL = Layout(axis="until", axis_title="deficit removed at epoch", per_length=False,
                 family_words="every window of the design", plannable=False,
                 label_format="until {end}", line_format="deficit from epoch 0")
