"""The measurement: frames in, the neck diameter of every frame out (pixels), then SI.

One pass over a stream of frames, in stage order:

- :mod:`~thinning.measure.layout`: where the filament is (orientation, end
  bodies, band, levels), from the first frame that shows one;
- :mod:`~thinning.measure.light`: the backlight of the band
  (:class:`~thinning.measure.light.LightField`), refitted as more background shows;
- :mod:`~thinning.measure.rows`: the row pass of a block of frames (a typed
  :class:`~thinning.measure.rows.RowBlock`; compiled in
  :mod:`~thinning.measure.compiled` where the install built it, numpy otherwise);
- :mod:`~thinning.measure.profile`: both edges, the free span and the local axis of each frame;
- :mod:`~thinning.measure.neck`: the minimum diameter of each frame from a local fit;
- :mod:`~thinning.measure.record`: :func:`measure_recording` (the whole stream, the start
  of free thinning, breakup, the findings) and :func:`to_physical` (SI).
"""

from .layout import Layout, NoFilament, find_layout
from .profile import Profile, locate_edges
from .record import NeckSeries, measure_recording, to_physical

__all__ = ["Layout", "NoFilament", "find_layout", "Profile", "locate_edges", "NeckSeries",
           "measure_recording", "to_physical"]
