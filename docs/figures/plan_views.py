"""Plan views for the documentation: the measurement set-up and the microphone positions.

Both pictures are drawn from the numbers below (an invented living room) and from the
demo room's geometry in :mod:`roomcorr.demo`; nothing is copied from elsewhere.
Run ``python docs/figures/plan_views.py OUT_DIR`` to draw them by hand.
"""

from __future__ import annotations

import sys
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
from matplotlib.patches import Circle, FancyArrowPatch, Polygon, Rectangle  # noqa: E402

# The tutorial's invented living room (metres; x across the room, y from the front wall).
ROOM_W_M, ROOM_L_M = 4.4, 5.6
SPEAKERS_M = {"left": (1.2, 0.55), "right": (3.2, 0.55)}
SEAT_M = (2.2, 3.4)
EAR_HEIGHT_M = 1.1
TWEETER_HEIGHT_M = 1.0
# Five positions around the seat (common practice: a few tens of centimetres apart,
# covering where heads are while listening).
# The fifth sits above the first (20 cm higher): behind the head is usually the seat's back.
POSITION_OFFSETS_M = ((0.0, 0.0), (-0.3, 0.0), (0.3, 0.0), (0.0, -0.3), (0.0, 0.0))
FIFTH_HIGHER_M = 0.2

_SPEAKER_COLOUR = "#37474f"
_MIC_COLOUR = "#c62828"
_CABLE_COLOUR = "#1565c0"


def _speaker(ax: plt.Axes, x: float, y: float, label: str) -> None:
    ax.add_patch(Rectangle((x - 0.13, y - 0.12), 0.26, 0.24, color=_SPEAKER_COLOUR))
    ax.annotate(label, (x, y - 0.12), xytext=(x, y - 0.32), ha="center", va="top", fontsize=9)


def _room(ax: plt.Axes, width_m: float, length_m: float) -> None:
    ax.add_patch(Rectangle((0, 0), width_m, length_m, fill=False, lw=2.5, color="0.3"))
    ax.set_xlim(-0.3, width_m + 0.3)
    ax.set_ylim(length_m + 0.3, -0.45)
    ax.set_aspect("equal")
    ax.set_xticks([])
    ax.set_yticks([])
    for side in ax.spines.values():
        side.set_visible(False)
    ax.text(width_m / 2, -0.3, "front wall", ha="center", va="center", fontsize=9, color="0.3")


def draw_setup(path: Path) -> None:
    """Draw the measurement set-up (plan and side view) into a PNG file.

    Parameters
    ----------
    path : Path
        The PNG file to write.
    """
    fig, (ax, side) = plt.subplots(
        1, 2, figsize=(10, 5.6), gridspec_kw={"width_ratios": [1.0, 1.1]}, layout="constrained"
    )
    _room(ax, ROOM_W_M, ROOM_L_M)
    ax.set_title("Plan view", fontsize=11)
    for name, (x, y) in SPEAKERS_M.items():
        _speaker(ax, x, y, f"{name} loudspeaker")
    sx, sy = SEAT_M
    ax.add_patch(Rectangle((sx - 0.9, sy + 0.25), 1.8, 0.6, color="0.85"))
    ax.text(sx, sy + 0.55, "sofa", ha="center", va="center", fontsize=9)
    ax.add_patch(Circle((sx, sy), 0.07, color=_MIC_COLOUR))
    ax.annotate("USB microphone on a stand,\nat the seat, ear height", (sx, sy),
                xytext=(sx + 0.35, sy - 0.9), fontsize=9, color=_MIC_COLOUR,
                arrowprops={"arrowstyle": "-", "color": _MIC_COLOUR})
    for x, y in SPEAKERS_M.values():
        ax.plot([x, sx], [y, sy], ls=":", color="0.5", lw=1)
    lx, ly = ROOM_W_M - 0.55, sy + 0.1
    ax.add_patch(Polygon([(lx - 0.22, ly - 0.15), (lx + 0.22, ly - 0.15), (lx + 0.22, ly + 0.15),
                          (lx - 0.22, ly + 0.15)], color="#90a4ae"))
    ax.text(lx, ly + 0.3, "laptop", ha="center", va="top", fontsize=9)
    amp = (ROOM_W_M / 2, 1.25)
    ax.add_patch(Rectangle((amp[0] - 0.25, amp[1] - 0.1), 0.5, 0.2, color="#b0bec5"))
    ax.text(amp[0], amp[1] + 0.15, "amplifier", ha="center", va="top", fontsize=8)
    ax.add_patch(FancyArrowPatch((lx, ly - 0.15), (amp[0] + 0.25, amp[1]), color=_CABLE_COLOUR,
                                 arrowstyle="-|>", mutation_scale=12,
                                 connectionstyle="arc3,rad=0.25"))
    ax.text(ROOM_W_M - 0.25, 1.5, "sweep out\n(headphone, HDMI\nor USB output)", fontsize=8,
            color=_CABLE_COLOUR, ha="right")
    ax.add_patch(FancyArrowPatch((sx + 0.05, sy + 0.03), (lx - 0.22, ly), color=_CABLE_COLOUR,
                                 arrowstyle="-|>", mutation_scale=12, ls="--"))
    ax.text((sx + lx) / 2, ly + 0.25, "USB cable", fontsize=8, color=_CABLE_COLOUR, ha="center")

    side.set_title("Side view", fontsize=11)
    dist = sy - SPEAKERS_M["left"][1]
    side.plot([0, dist + 1.2], [0, 0], color="0.3", lw=2.5)
    side.add_patch(Rectangle((-0.13, 0), 0.26, TWEETER_HEIGHT_M + 0.15, color=_SPEAKER_COLOUR))
    side.add_patch(Circle((0.0, TWEETER_HEIGHT_M), 0.05, color="white"))
    side.text(0.0, TWEETER_HEIGHT_M + 0.25, "tweeter", ha="center", fontsize=9)
    side.plot([dist, dist], [0, EAR_HEIGHT_M], color="0.4", lw=1.5)
    side.plot([dist - 0.2, dist, dist + 0.2], [0, 0.1, 0], color="0.4", lw=1.5)
    side.add_patch(Circle((dist, EAR_HEIGHT_M), 0.05, color=_MIC_COLOUR))
    side.annotate("microphone at ear height\n(pointing as its calibration\nfile says)",
                  (dist, EAR_HEIGHT_M), xytext=(dist - 1.9, EAR_HEIGHT_M + 0.45), fontsize=9,
                  color=_MIC_COLOUR, arrowprops={"arrowstyle": "-", "color": _MIC_COLOUR})
    side.annotate("", (dist, 0.35), (0, 0.35),
                  arrowprops={"arrowstyle": "<->", "color": "0.4"})
    side.text(dist / 2, 0.2, f"about {dist:.1f} m", ha="center", fontsize=9, color="0.3")
    side.text(dist / 2, -0.35, "Keep the path clear: nobody between loudspeaker and microphone",
              ha="center", fontsize=9)
    side.set_xlim(-0.5, dist + 1.2)
    side.set_ylim(-0.5, 2.1)
    side.set_aspect("equal")
    side.set_xticks([])
    side.set_yticks([])
    for s in side.spines.values():
        s.set_visible(False)
    fig.savefig(path, dpi=110)
    plt.close(fig)


def _demo_geometry() -> tuple[tuple[float, float, float], list, list]:
    """Room size, loudspeaker and microphone positions of the demo room (metres)."""
    from roomcorr import demo

    return demo.ROOM_DIMS_M, list(demo.SPEAKER_POSITIONS_M), list(demo.MIC_POSITIONS_M)


def draw_positions(path: Path) -> None:
    """Draw the listening-area positions: a pattern to follow and the demo room's four.

    Parameters
    ----------
    path : Path
        The PNG file to write.
    """
    fig, (ax, demo_ax) = plt.subplots(1, 2, figsize=(10, 5.2), layout="constrained")
    ax.set_title("Five positions around your seat (suggested)", fontsize=11)
    sx, sy = 0.0, 0.0
    ax.add_patch(Rectangle((-0.45, 0.5), 0.9, 0.3, color="0.88"))
    ax.text(0, 0.65, "back of the seat", ha="center", va="center", fontsize=9)
    ax.add_patch(Circle((0, 0), 0.45, fill=False, ls="--", color="0.6"))
    for k, (dx, dy) in enumerate(POSITION_OFFSETS_M[:4], start=1):
        ax.add_patch(Circle((sx + dx, sy + dy), 0.045, color=_MIC_COLOUR))
        ax.text(sx + dx + 0.06, sy + dy - 0.06, str(k), fontsize=11, color=_MIC_COLOUR)
    ax.add_patch(Circle((sx, sy), 0.085, fill=False, lw=2, color=_MIC_COLOUR))
    ax.annotate(f"5: above 1, {FIFTH_HIGHER_M * 100:.0f} cm higher", (sx + 0.06, sy + 0.06),
                xytext=(sx + 0.12, sy + 0.25), fontsize=9, color=_MIC_COLOUR,
                arrowprops={"arrowstyle": "-", "color": _MIC_COLOUR})
    ax.annotate("", (0.3, -0.45), (0, -0.45), arrowprops={"arrowstyle": "<->", "color": "0.4"})
    ax.text(0.15, -0.5, "30 cm", ha="center", fontsize=9, color="0.3")
    ax.annotate("towards the loudspeakers", (0, -0.8), (0, -0.58), ha="center", fontsize=9,
                arrowprops={"arrowstyle": "-|>", "color": "0.4"})
    ax.text(0, 0.98, "1 = where your head is; 2, 3, 4 around it at ear height.\n"
            "The dashed circle is the listening area the design is made for.",
            ha="center", fontsize=9)
    ax.set_xlim(-0.9, 0.9)
    ax.set_ylim(1.15, -0.9)
    ax.set_aspect("equal")
    ax.axis("off")

    (length, width, _h), speakers, mics = _demo_geometry()
    demo_ax.set_title("The demo room's four positions (roomcorr demo)", fontsize=11)
    # The demo's x runs from the front wall to the back, y from the left wall to the right.
    _room(demo_ax, width, length)
    for name, (x, y, _z) in zip(("left", "right"), speakers, strict=False):
        _speaker(demo_ax, y, x, name)
    label_offsets = ((0.0, -0.9), (-1.2, -0.5), (0.9, -0.5), (0.0, 0.7))
    for k, (x, y, z) in enumerate(mics, start=1):
        demo_ax.add_patch(Circle((y, x), 0.05, color=_MIC_COLOUR))
        dx, dy = label_offsets[(k - 1) % len(label_offsets)]
        demo_ax.annotate(f"pos{k} ({z:.2f} m high)", (y, x), xytext=(y + dx, x + dy),
                         fontsize=8, color=_MIC_COLOUR, ha="center",
                         arrowprops={"arrowstyle": "-", "color": _MIC_COLOUR, "lw": 0.7})
    demo_ax.text(width / 2, length + 0.15, f"{length:.2f} m x {width:.2f} m", ha="center",
                 va="top", fontsize=9, color="0.3")
    fig.savefig(path, dpi=110)
    plt.close(fig)


if __name__ == "__main__":
    out = Path(sys.argv[1] if len(sys.argv) > 1 else ".")
    out.mkdir(parents=True, exist_ok=True)
    draw_setup(out / "setup.png")
    draw_positions(out / "positions.png")
