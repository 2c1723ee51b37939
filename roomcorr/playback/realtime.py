"""Real-time listening: corrected and uncorrected paths, and a switch that cross-fades.

Both paths run all the time, block by block (so a switch takes effect at
the next block): the corrected one through the design (uniformly partitioned
convolution, :class:`~roomcorr.playback.render.BlockConvolver`), the
uncorrected one through the same routes without filters, delayed by the
design's latency (so the two line up in time) and lowered to the corrected
version's loudness. A switch fades linearly from one to the other over
:data:`FADE_S`: each output sample moves by at most the music's own change
plus ``|corrected - uncorrected| / fade length``, so there is no click.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from roomcorr.deliver.plan import RoutePlan
from roomcorr.playback.render import BlockConvolver

#: Length of the cross-fade between the two states (seconds).
FADE_S = 0.03
#: Default block for listening (samples).
LISTEN_BLOCK = 256


@dataclass
class SwitchState:
    """Which path is heard: ``target`` (True: corrected) and the fade position 0..1."""

    target: bool = True
    position: float = 1.0


class ListeningPaths:
    """Render music block by block through both paths and cross-fade between them.

    Parameters
    ----------
    plan : RoutePlan
    uncorrected_gain_db : float
        Gain of the uncorrected path (the loudness match, usually negative).
    block : int
    level_db : float
        Overall playback level (<= 0 dB; the listener raises it step by step).
    """

    def __init__(
        self,
        plan: RoutePlan,
        uncorrected_gain_db: float,
        block: int = LISTEN_BLOCK,
        level_db: float = -20.0,
    ) -> None:
        self.plan = plan
        self.block = int(block)
        self.conv = BlockConvolver(plan.combined_filters(), plan.mix, self.block)
        self.unc_gain = 10.0 ** (uncorrected_gain_db / 20.0)
        self.unc_delay = int(plan.latency_samples)
        self.unc_mix = plan.mix * plan.trim[:, None]
        self._hist = np.zeros((plan.n_outputs, self.unc_delay + self.block))
        self.state = SwitchState()
        self.fade_step = 1.0 / max(1, round(FADE_S * plan.fs))
        self.level = 10.0 ** (min(level_db, 0.0) / 20.0)

    def toggle(self) -> bool:
        """Switch to the other path; returns True when the corrected one is next."""
        self.state.target = not self.state.target
        return self.state.target

    def set(self, corrected: bool) -> None:
        self.state.target = bool(corrected)

    def set_level_db(self, level_db: float) -> None:
        """Overall level in dB, capped at 0 dB (never above the file's own level)."""
        self.level = 10.0 ** (min(float(level_db), 0.0) / 20.0)

    def _uncorrected(self, x: np.ndarray) -> np.ndarray:
        m = self.unc_gain * (self.unc_mix @ x)
        if self.unc_delay == 0:
            return m
        self._hist[:, : self.unc_delay] = self._hist[:, self.block :]
        self._hist[:, self.unc_delay :] = m
        return self._hist[:, : self.block].copy()

    def process(self, x: np.ndarray) -> np.ndarray:
        """One block, shape (n_inputs, block) -> (n_outputs, block)."""
        corr = self.conv.process(x)
        unc = self._uncorrected(x)
        step = self.fade_step if self.state.target else -self.fade_step
        pos = self.state.position + step * np.arange(1, self.block + 1)
        a = np.clip(pos, 0.0, 1.0)
        self.state.position = float(a[-1])
        return self.level * (a * corr + (1.0 - a) * unc)
