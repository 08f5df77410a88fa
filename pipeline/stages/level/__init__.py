"""Levelling stages: background plane/polynomial, line offsets, terraces, scars.

Every stage takes a processed frame (:func:`pipeline.model.make_height_frame`: ``height`` in m,
``height_uncertainty``, ``flags``; coordinates ``x``, ``y`` in m) and returns a new one. Pixels
that are NaN or carry a flag of :data:`pipeline.model.BAD_PIXELS` take part in no fit; they are
carried through unchanged (NaN stays NaN).

Recommended order in a batch::

    repair_scars -> level_lines -> level_terraces      (terraces on; its own common plane)
    repair_scars -> level_lines -> subtract_background (terraces off)

Scars first: they are found against the neighbouring lines whatever the line offsets are, and
once repaired they take part in the line matching as ordinary pixels. Line offsets next: they
cut spurious edges into the terrace segmentation and add noise to any plane, while the line
levelling itself keeps the plane's tilt and the steps. The background last: with terraces on,
:func:`level_terraces` fits the common plane (or polynomial) itself, and a plane subtracted
before it would only be refitted; a polynomial subtracted before it would eat into the
staircase.

All fits work in float64 on coordinates normalised to [-1, 1] (for conditioning); maps are
returned as float32.
"""

from pipeline.stages.level.background import subtract_background
from pipeline.stages.level.lines import level_lines
from pipeline.stages.level.scars import repair_scars
from pipeline.stages.level.terraces import level_terraces

__all__ = ["level_lines", "level_terraces", "repair_scars", "subtract_background"]
