"""Physical model of a rectangular room and its loudspeakers at low frequencies.

Pure functions on numpy arrays (no I/O): Rayleigh's mode frequencies and the
modal expansion of the rigid-walled rectangular room's Green's function
(:mod:`roomcorr.physics.modes`), image sources for the early reflections and the
full image-source sum in the frequency domain (:mod:`roomcorr.physics.images`) and
the loudspeaker's own response
(:mod:`roomcorr.physics.loudspeaker`). The invented demo room
(:mod:`roomcorr.demo`), the evaluation rooms (:mod:`roomcorr.evaluation.simulate`)
and placement (:mod:`roomcorr.placement`) all use these.

Coordinates here are those of the caller: three axes with the origin in one
corner of the room and ``dims_m`` the room's extent along each; the modes and
images do not care which axis is which.
"""

from roomcorr.physics.images import (
    early_spectrum,
    first_order_reflections,
    image_lattice,
    image_order_for,
    image_sources,
    lattice_spectra,
    lattice_weights,
)
from roomcorr.physics.loudspeaker import (
    highpass_response,
    linkwitz_riley4,
    shelf,
    speaker_response,
    wall_shelf,
)
from roomcorr.physics.modes import (
    C_SOUND_M_S,
    axial_mode_frequencies,
    modal_response,
    mode_grid,
    mode_kind,
    room_mode_frequencies,
    sabine_t60_s,
    schroeder_frequency_hz,
)

__all__ = [
    "C_SOUND_M_S",
    "axial_mode_frequencies",
    "early_spectrum",
    "first_order_reflections",
    "highpass_response",
    "image_lattice",
    "image_order_for",
    "image_sources",
    "lattice_spectra",
    "lattice_weights",
    "linkwitz_riley4",
    "modal_response",
    "mode_grid",
    "mode_kind",
    "room_mode_frequencies",
    "sabine_t60_s",
    "schroeder_frequency_hz",
    "shelf",
    "speaker_response",
    "wall_shelf",
]
