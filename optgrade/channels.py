"""The one list of channel names: where the power of an incident Rayleigh wave can go.

Every stage uses these names and index constants (trace.json keys, LocalModes axes, goals, the
full-wave split, figures). Channel names follow the incident (+x) frame: radiation towards -x is
``backward_*`` whichever wave produced it.
"""

from __future__ import annotations

#: The seven channels every frequency's power is split into; they sum to 1.
CHANNELS: tuple[str, ...] = (
    "transmitted_surface",
    "reflected_surface",
    "forward_shear",
    "forward_compressional",
    "backward_shear",
    "backward_compressional",
    "absorbed",
)

#: The four bulk (converted) channels, in the order of ``LocalModes.angle``'s second axis.
RADIATING: tuple[str, ...] = CHANNELS[2:6]

#: The five decay channels of a local mode, in the order of ``LocalModes.shares``' second axis.
DECAY: tuple[str, ...] = (*RADIATING, "absorbed")

#: Surface channels.
SURFACE: tuple[str, ...] = CHANNELS[:2]

#: Goal-only channel: the surface wave stopped by the row, measured against bare ground.
BLOCKING = "blocking"

#: Channels a study may name as its wanted channel (``[goal] channel``).
GOAL_CHANNELS: tuple[str, ...] = (
    "backward_shear",
    "backward_compressional",
    "forward_shear",
    "forward_compressional",
    BLOCKING,
    "reflected_surface",
)

# index constants into CHANNELS
TRANSMITTED, REFLECTED, FORWARD_SHEAR, FORWARD_COMPRESSIONAL = 0, 1, 2, 3
BACKWARD_SHEAR, BACKWARD_COMPRESSIONAL, ABSORBED = 4, 5, 6

__all__ = [
    "ABSORBED",
    "BACKWARD_COMPRESSIONAL",
    "BACKWARD_SHEAR",
    "BLOCKING",
    "CHANNELS",
    "DECAY",
    "FORWARD_COMPRESSIONAL",
    "FORWARD_SHEAR",
    "GOAL_CHANNELS",
    "RADIATING",
    "REFLECTED",
    "SURFACE",
    "TRANSMITTED",
]
