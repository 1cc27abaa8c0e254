"""Co-registration of the module layout to the thermal orthomosaic.

Drone orthomosaics are routinely off by tens of centimetres to a few metres against the
layout drawing; half a module's width of offset is enough to read ground or gap pixels
as module pixels. This module measures the offset from the image itself and translates
the footprints used for measuring.

Method
------
The ortho is cut into blocks (``block_m`` on a side, per tile). In each block

1. the image is read through windowed reads, reduced to a working grid of about
   ``work_gsd_m`` and clipped to its central percentiles (so that hot spots do not
   dominate);
2. the layout footprints are rasterised on the same grid with sub-pixel coverage
   (``supersample`` x ``supersample`` samples per pixel);
3. both are turned into the feature that is compared: by default (``feature =
   "gradient"``) the Gaussian gradient magnitude, i.e. the strength of the edges whatever
   their polarity, because the glass may be warmer than shaded ground on one side of a
   table and cooler than sunlit ground on the other; or (``"intensity"``) the values
   themselves, with one contrast sign for the flight decided by a vote of the blocks;
4. both are tapered and phase-correlated: the cross-power spectrum, high-passed
   (``highpass_sigma_m``) and partially whitened (``whitening``: 0 = plain
   cross-correlation, 1 = pure phase correlation), is transformed back and searched for
   its best peak within ``max_shift_m``; a stronger peak in a guard ring up to
   ``guard_factor`` times farther flags the block (the offset may exceed the radius);
5. the candidate peaks are refined by the matrix-multiply upsampled DFT of
   Guizar-Sicairos et al. (2008) to ``1 / upsample`` pixel.

Rows of tables are periodic: a shift by one row pitch (or one module pitch) scores
almost as well as the true shift. Each block therefore keeps every candidate peak
within ``ambiguity_ratio`` of its best one. The true peak is the best only thanks to
aperiodic structure (table ends, block and array edges); blocks whose best peak is
not distinct from the next one get a low confidence, and every block finally takes
the candidate nearest to the consensus of the confident blocks. A block rejected as an
outlier whose runner-up peak agrees with the fit is re-admitted with that peak.

The block shifts are combined by an iteratively reweighted least-squares fit of a
similarity transform (translation, rotation, scale) with outlier rejection; its
rotation and scale are reported, and when ``follow_drift`` is set each module is
translated by the fitted shift at its own centre, so a drift across a large site is
followed.

A row's shadow on the ground can be as wide as the row and more uniform than the glass
(single-axis trackers in the morning or evening): the footprint mask then fits the
shadow strip better than the row itself, and no edge or texture statistic tells the two
apart. Physics does: when the caller gives the apparent temperature sunlit glass should
show at the flight's conditions (:func:`expected_module_apparent_c`: Faiman model, then
the radiometric chain of :mod:`pvscan.physics.radiometry`), the candidate shifts of all blocks
(down to ``plausibility_ratio`` of the best peak, and always the one nearest zero shift)
are grouped, and the median apparent temperature each puts inside a sample of
``plausibility_modules`` footprints is measured (one windowed read per module). A
candidate replaces the fit only when it is ``plausibility_margin_k`` closer to the
expectation and itself within ``plausibility_max_error_k`` of it; among candidates the
temperature cannot tell apart (one module pitch along a row), the correlation decides.
The blocks are then refitted around the chosen candidate.

References
----------
.. [1] M. Guizar-Sicairos, S. T. Thurman and J. R. Fienup, "Efficient subpixel image
   registration algorithms", Optics Letters 33(2), 156-158, 2008.
   doi:10.1364/OL.33.000156
.. [2] C. D. Kuglin and D. C. Hines, "The phase correlation image alignment method",
   Proc. IEEE Int. Conf. on Cybernetics and Society, 163-165, 1975.
.. [3] D. Faiman, "Assessing the outdoor operating temperature of photovoltaic modules",
   Progress in Photovoltaics 16(4), 307-315, 2008. doi:10.1002/pip.813
"""
from __future__ import annotations

from pvscan.measure.register._blocks import _as_mappings  # noqa: F401  (used by tests)
from pvscan.measure.register._records import BlockShift, Registration
from pvscan.measure.register.correlate import CorrelationPeak, correlation_surface, phase_correlate, upsampled_peak
from pvscan.measure.register.estimate import align_flight, apply_shift, estimate_shift
from pvscan.measure.register.evidence import Placement, sun_vector
from pvscan.measure.register.fit import align_layout, apply_placement, placement_of, register_layout
from pvscan.measure.register.physics import expected_module_apparent_c

__all__ = [
    "BlockShift",
    "Registration",
    "CorrelationPeak",
    "estimate_shift",
    "expected_module_apparent_c",
    "apply_shift",
    "phase_correlate",
    "correlation_surface",
    "upsampled_peak",
    "align_flight",
    "register_layout",
    "align_layout",
    "apply_placement",
    "placement_of",
    "Placement",
    "sun_vector",
]
