"""What the axes mean: axis cards built from the model, the scores, the sample annotations
and the supplementary elements.

Modules, in the order of the work: :mod:`.annotations` (reading and treating annotation
columns), :mod:`.associations` (R² of annotations, category z-scores),
:mod:`.supplementary` (one streaming pass for supplementary features), :mod:`.cards` (the
record set and its entry point :func:`explain_axes`), :mod:`.pages` (the Markdown page of an
axis), :mod:`.legend` (the meaning of every column), :mod:`.saved` (reading a fit's result
directory) and :mod:`.plan` (explaining at fit time).
"""

from .cards import AxisCards, explain_axes

__all__ = ["AxisCards", "explain_axes"]
