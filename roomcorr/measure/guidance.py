"""Where to put the microphone: advice that depends on the design to come.

With several subwoofers the design chooses their delays and levels to make
the seats agree (``roomcorr.design.system.subwoofers``); it can only judge seats it
was shown, so the positions must cover the whole listening area (the width
of a sofa and, with two rows, its depth), not cluster round one head. Pure
functions (numbers in, text out).
"""

from __future__ import annotations

#: Fewest positions suggested with several subwoofers (the corners and centre of the area).
MIN_POSITIONS_SEVERAL_SUBS = 5


def positions_advice(n_subwoofers: int, n_positions: int) -> str | None:
    """Advice on spreading the positions, or ``None`` with fewer than two subwoofers."""
    if n_subwoofers < 2:
        return None
    more = (
        f" Measure at least {MIN_POSITIONS_SEVERAL_SUBS} positions ({n_positions} planned)."
        if n_positions < MIN_POSITIONS_SEVERAL_SUBS
        else ""
    )
    return (
        f"{n_subwoofers} subwoofers are named: their delays and levels are chosen to make the "
        "seats agree, so spread the positions over the whole listening area (both ends of "
        "the sofa, its middle, and a second row or 0.5 m in front and behind if people sit "
        "there), ear height, not clustered round one head." + more
    )
