"""The board's colours: WCAG 2.x AA contrast for every pair the board uses, priority told
apart by lightness under simulated colour-vision deficiencies, and no colour in board.css
outside the palette."""

from __future__ import annotations

import itertools
import re
from pathlib import Path

import pytest

from daemon.web.palette import PAIRS, PALETTE, PRIORITY_ORDER, contrast, relative_luminance

CSS = Path(__file__).resolve().parent.parent / "daemon" / "web" / "static" / "board.css"

# source: WCAG 2.1, 1.4.3 Contrast (Minimum): 4.5:1 for text; 1.4.11 Non-text Contrast: 3:1
TEXT_AA = 4.5
NON_TEXT_AA = 3.0
# Machado, Oliveira & Fernandes, "A physiologically-based model for simulation of color
# vision deficiency", IEEE TVCG 2009, severity 1.0 matrices on linear RGB (from memory).
CVD = {
    "protanopia": ((0.152286, 1.052583, -0.204868), (0.114503, 0.786281, 0.099216),
                   (-0.003882, -0.048116, 1.051998)),
    "deuteranopia": ((0.367322, 0.860646, -0.227968), (0.280085, 0.672501, 0.047413),
                     (-0.011820, 0.042940, 0.968881)),
    "tritanopia": ((1.255528, -0.076749, -0.178779), (-0.078411, 0.930809, 0.147602),
                   (0.004733, 0.691367, 0.303900)),
}  # fmt: skip
# Priority fills next to each other must differ by at least this ratio under every
# simulated vision: ours, no single source (a clear step in lightness).
PRIORITY_STEP = 1.4


def test_the_wcag_formula_gives_published_values():
    # source: WCAG 2.1 definition of contrast ratio: black on white is 21:1, equal is 1:1
    assert contrast("#000000", "#ffffff") == pytest.approx(21.0)
    assert contrast("#777777", "#777777") == pytest.approx(1.0)
    # source: WCAG 2.1 relative luminance of pure red 0.2126 (its coefficient)
    assert relative_luminance("#ff0000") == pytest.approx(0.2126)


@pytest.mark.parametrize(("fg", "bg", "what", "least"), PAIRS)
def test_every_pair_meets_wcag_aa(fg, bg, what, least):
    assert least >= (TEXT_AA if least > NON_TEXT_AA else NON_TEXT_AA)
    ratio = contrast(PALETTE[fg], PALETTE[bg])
    assert ratio >= least, f"{what}: {fg} on {bg} is {ratio:.2f}:1, needs {least}:1"


def test_every_badge_text_pair_is_checked_as_text():
    for p in PRIORITY_ORDER:
        assert (f"{p}-ink", f"{p}-fill") in {(f, b) for f, b, _, m in PAIRS if m >= TEXT_AA}


def _simulate(hex_colour: str, m: tuple[tuple[float, ...], ...]) -> str:
    rgb = [int(hex_colour[i : i + 2], 16) / 255.0 for i in (1, 3, 5)]
    lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
    out = [min(1.0, max(0.0, sum(m[r][k] * lin[k] for k in range(3)))) for r in range(3)]
    srgb = [12.92 * c if c <= 0.0031308 else 1.055 * c ** (1 / 2.4) - 0.055 for c in out]
    return "#" + "".join(f"{round(c * 255):02x}" for c in srgb)


@pytest.mark.parametrize("vision", ["typical", *CVD])
def test_priorities_differ_in_lightness_for_every_colour_vision(vision):
    fills = [PALETTE[f"{p}-fill"] for p in PRIORITY_ORDER]
    if vision != "typical":
        fills = [_simulate(c, CVD[vision]) for c in fills]
    lum = [relative_luminance(c) for c in fills]
    assert lum == sorted(lum), f"{vision}: more urgent must be darker: {fills}"
    for a, b in itertools.pairwise(fills):
        assert contrast(a, b) >= PRIORITY_STEP, f"{vision}: {a} vs {b}"


def test_the_stylesheet_uses_only_palette_colours():
    css = CSS.read_text()
    assert not re.findall(r"#[0-9a-fA-F]{3,8}\b", css)
    assert not re.findall(r"\b(rgb|hsl)a?\(", css)
    used = set(re.findall(r"var\(--([a-z-]+)\)", css))
    assert used <= set(PALETTE), used - set(PALETTE)
