"""The board's colours: the one place they are set (board.css uses only these names).

Our own palette: warm greys for the page, one violet hue whose depth rises with alarm
priority (as in the replay report's plots), a dark blue for the output itself. Priority
is never colour alone: every badge carries its word and a shape (a level of one to
three bars), and the fills differ in lightness, so they stay apart for every kind of
colour vision. tests/test_board_palette.py checks the contrast ratios (WCAG 2.x AA).
"""

from __future__ import annotations

from types import MappingProxyType

PALETTE = MappingProxyType({
    "page": "#f4f3ef",          # page background
    "card": "#ffffff",          # bed card background
    "text": "#1d1d1f",
    "muted": "#4f4f52",         # secondary text
    "edge": "#8a877f",          # card and table borders (non-text: >= 3:1 on page and card)
    "link": "#1a4f8b",
    "focus": "#1a4f8b",         # keyboard focus ring
    "button": "#1a4f8b",        # primary button
    "button-text": "#ffffff",
    "high-fill": "#3d1a66",     # priority badges: fill, text and bars on it
    "high-ink": "#ffffff",
    "medium-fill": "#7a52a6",
    "medium-ink": "#ffffff",
    "low-fill": "#cfbbe4",
    "low-ink": "#2a1445",
    "info-fill": "#f3f3f1",
    "info-ink": "#2d2d2f",
    "ok-ink": "#1f5a2c",        # "no alarm", "reporting"
    "warn-ink": "#7a3600",      # a meter offline or blind, a bag nearly full
    "banner": "#1d1d1f",        # the live connection or the service is down
    "banner-text": "#ffffff",
    "stale": "#c9c6bf",         # hatching over a board that may be out of date
    "output": "#1f4e79",        # chart: rolling hourly output
    "threshold": "#3a3a3a",     # chart: rule thresholds
    "unknown": "#dcdad4",       # chart: minutes without data
    "bag": "#4f4f52",           # chart: bag changes
})  # fmt: skip

# (foreground, background, what it is, least ratio): text needs 4.5:1 (WCAG 2.x 1.4.3,
# AA), borders, bars and chart lines 3:1 against what they sit on (1.4.11).
PAIRS: tuple[tuple[str, str, str, float], ...] = (
    ("text", "page", "text on the page", 4.5),
    ("text", "card", "text on a card", 4.5),
    ("muted", "page", "secondary text on the page", 4.5),
    ("muted", "card", "secondary text on a card", 4.5),
    ("link", "card", "links on a card", 4.5),
    ("link", "page", "links on the page", 4.5),
    ("button-text", "button", "button label", 4.5),
    ("high-ink", "high-fill", "high priority badge", 4.5),
    ("medium-ink", "medium-fill", "medium priority badge", 4.5),
    ("low-ink", "low-fill", "low priority badge", 4.5),
    ("info-ink", "info-fill", "info priority badge", 4.5),
    ("ok-ink", "card", "all-clear words", 4.5),
    ("warn-ink", "card", "meter problem words", 4.5),
    ("banner-text", "banner", "connection banner", 4.5),
    ("edge", "card", "card and table borders", 3.0),
    ("edge", "page", "card edges on the page", 3.0),
    ("focus", "card", "focus ring on a card", 3.0),
    ("focus", "page", "focus ring on the page", 3.0),
    ("output", "card", "chart: output line", 3.0),
    ("threshold", "card", "chart: threshold lines", 3.0),
    ("bag", "card", "chart: bag change marks", 3.0),
    ("high-fill", "card", "chart: high priority span", 3.0),
    ("medium-fill", "card", "chart: medium priority span", 3.0),
)

# Priority fills, most urgent first: each must be darker than the next by a clear step.
PRIORITY_ORDER = ("high", "medium", "low", "info")


def css_variables() -> str:
    """`:root` custom properties for board.css."""
    body = "".join(f"--{name}:{value};" for name, value in PALETTE.items())
    return f":root{{{body}}}\n"


def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.x relative luminance of an sRGB colour '#rrggbb'."""
    rgb = [int(hex_colour[i : i + 2], 16) / 255.0 for i in (1, 3, 5)]
    lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb]
    return 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]


def contrast(a: str, b: str) -> float:
    """WCAG 2.x contrast ratio of two colours, 1 to 21."""
    la, lb = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (la + 0.05) / (lb + 0.05)
