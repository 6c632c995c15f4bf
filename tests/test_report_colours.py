"""No scheme colour of the HTML report reads as a severity.

A scheme tag is a light fill; a severity is a dark, saturated colour used for marks,
borders and text. A fill "reads as an alarm" when it looks like a light tint of a
severity colour, so each fill is compared with the tint of every severity colour (that
colour mixed with white) at the fill's own lightness, by the CIEDE2000 colour
difference.

Sources: sRGB to CIE XYZ with the D65 white point as IEC 61966-2-1 (the sRGB
standard) defines it; CIE 1976 L*a*b* from XYZ (CIE 15, colorimetry); CIEDE2000 as
written out by G. Sharma, W. Wu and E. N. Dalal, "The CIEDE2000 color-difference
formula: implementation notes, supplementary test data, and mathematical
observations", Color Research & Application 30(1), 2005, whose test pairs check the
implementation below.
"""

from __future__ import annotations

import math
import re
from importlib import resources

import pytest

from slicetime.interfaces.report_html import NO_TIMING_FILL, TAG_FILLS

#: a fill closer than this to a severity tint can be taken for that severity (common
#: practice (no source): a CIEDE2000 difference of about 10 is clearly another colour
#: at a glance; 1 to 2 is the just-noticeable difference)
MIN_FROM_SEVERITY = 10.0
#: two scheme fills must be told apart at a glance too (the tag's number helps)
MIN_BETWEEN_FILLS = 6.0


def to_lab(hex_colour: str) -> tuple[float, float, float]:
    """sRGB (IEC 61966-2-1, D65) to CIE 1976 L*a*b*."""
    text = hex_colour.lstrip("#")
    rgb = [int(text[i:i + 2], 16) / 255 for i in (0, 2, 4)]
    r, g, b = (c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in rgb)
    x = 0.4124 * r + 0.3576 * g + 0.1805 * b
    y = 0.2126 * r + 0.7152 * g + 0.0722 * b
    z = 0.0193 * r + 0.1192 * g + 0.9505 * b

    def f(t: float) -> float:
        return t ** (1 / 3) if t > (6 / 29) ** 3 else t / (3 * (6 / 29) ** 2) + 4 / 29

    fx, fy, fz = f(x / 0.95047), f(y / 1.0), f(z / 1.08883)
    return 116 * fy - 16, 500 * (fx - fy), 200 * (fy - fz)


def ciede2000(lab1: tuple[float, float, float], lab2: tuple[float, float, float]) -> float:
    """The CIEDE2000 difference (kL = kC = kH = 1), Sharma, Wu & Dalal (2005), eq. 1-22."""
    l1, a1, b1 = lab1
    l2, a2, b2 = lab2
    c_mean = (math.hypot(a1, b1) + math.hypot(a2, b2)) / 2
    g = 0.5 * (1 - math.sqrt(c_mean ** 7 / (c_mean ** 7 + 25 ** 7)))
    a1p, a2p = (1 + g) * a1, (1 + g) * a2
    c1p, c2p = math.hypot(a1p, b1), math.hypot(a2p, b2)
    h1p = math.degrees(math.atan2(b1, a1p)) % 360 if (a1p or b1) else 0.0
    h2p = math.degrees(math.atan2(b2, a2p)) % 360 if (a2p or b2) else 0.0
    dl, dc = l2 - l1, c2p - c1p
    dh = 0.0
    if c1p * c2p:
        dh = h2p - h1p
        dh = dh - 360 if dh > 180 else dh + 360 if dh < -180 else dh
    d_big_h = 2 * math.sqrt(c1p * c2p) * math.sin(math.radians(dh / 2))
    l_mean, cp_mean = (l1 + l2) / 2, (c1p + c2p) / 2
    if c1p * c2p == 0:
        h_mean = h1p + h2p
    elif abs(h1p - h2p) <= 180:
        h_mean = (h1p + h2p) / 2
    else:
        h_mean = (h1p + h2p + 360) / 2 if h1p + h2p < 360 else (h1p + h2p - 360) / 2
    t = (1 - 0.17 * math.cos(math.radians(h_mean - 30)) + 0.24 * math.cos(math.radians(2 * h_mean))
         + 0.32 * math.cos(math.radians(3 * h_mean + 6))
         - 0.20 * math.cos(math.radians(4 * h_mean - 63)))
    d_theta = 30 * math.exp(-(((h_mean - 275) / 25) ** 2))
    r_c = 2 * math.sqrt(cp_mean ** 7 / (cp_mean ** 7 + 25 ** 7))
    s_l = 1 + 0.015 * (l_mean - 50) ** 2 / math.sqrt(20 + (l_mean - 50) ** 2)
    s_c = 1 + 0.045 * cp_mean
    s_h = 1 + 0.015 * cp_mean * t
    r_t = -math.sin(math.radians(2 * d_theta)) * r_c
    return math.sqrt((dl / s_l) ** 2 + (dc / s_c) ** 2 + (d_big_h / s_h) ** 2
                     + r_t * (dc / s_c) * (d_big_h / s_h))


def tint(hex_colour: str, lightness: float) -> str:
    """``hex_colour`` mixed with white until its L* is ``lightness`` (bisection)."""
    text = hex_colour.lstrip("#")
    rgb = [int(text[i:i + 2], 16) for i in (0, 2, 4)]

    def mixed(t: float) -> str:
        return "#" + "".join(f"{round(c + (255 - c) * t):02x}" for c in rgb)

    low, high = 0.0, 1.0
    for _ in range(40):
        mid = (low + high) / 2
        low, high = (mid, high) if to_lab(mixed(mid))[0] < lightness else (low, mid)
    return mixed((low + high) / 2)


def severity_colours() -> dict[str, str]:
    """The severity colours as the page's style sheet declares them."""
    css = (resources.files("slicetime") / "data" / "report.css").read_text("utf-8")
    found = dict(re.findall(r"--(error|warning|note|clean):(#[0-9a-f]{6})", css))
    assert set(found) == {"error", "warning", "note", "clean"}
    return found


@pytest.mark.parametrize(
    ("lab1", "lab2", "expected"),
    [  # Sharma, Wu & Dalal (2005), Table 1, pairs 1, 7, 17, 18, 19, 20 (from memory)
        ((50.0, 2.6772, -79.7751), (50.0, 0.0, -82.7485), 2.0425),
        ((50.0, 0.0, 0.0), (50.0, -1.0, 2.0), 2.3669),
        ((50.0, 2.5, 0.0), (73.0, 25.0, -18.0), 27.1492),
        ((50.0, 2.5, 0.0), (61.0, -5.0, 29.0), 22.8977),
        ((50.0, 2.5, 0.0), (56.0, -27.0, -3.0), 31.9030),
        ((50.0, 2.5, 0.0), (58.0, 24.0, 15.0), 19.4535),
    ],
)
def test_ciede2000_matches_the_published_pairs(lab1: tuple[float, float, float],
                                               lab2: tuple[float, float, float],
                                               expected: float) -> None:
    assert ciede2000(lab1, lab2) == pytest.approx(expected, abs=1e-4)


def test_srgb_to_lab_reference_points() -> None:
    # white is L* 100 with no colour (D65 white point); mid grey 50 % has no colour either
    white = to_lab("#ffffff")
    assert white[0] == pytest.approx(100, abs=0.01) and abs(white[1]) < 0.01
    grey = to_lab("#777777")
    assert abs(grey[1]) < 0.01 and abs(grey[2]) < 0.01


def test_no_scheme_fill_reads_as_a_severity() -> None:
    severities = severity_colours()
    for fill in TAG_FILLS:
        lab = to_lab(fill)
        for name, colour in severities.items():
            distance = ciede2000(lab, to_lab(tint(colour, lab[0])))
            assert distance >= MIN_FROM_SEVERITY, (fill, name, round(distance, 1))


def test_scheme_fills_differ_from_each_other() -> None:
    fills = [*TAG_FILLS, NO_TIMING_FILL]
    for i, first in enumerate(fills):
        for second in fills[i + 1:]:
            assert ciede2000(to_lab(first), to_lab(second)) >= MIN_BETWEEN_FILLS, (first, second)


def test_the_old_peach_and_pink_fail_the_check() -> None:
    # the check can fail: the former fills beside the warning and error colours
    severities = severity_colours()
    for fill, name in (("#f3dcb5", "warning"), ("#f2cfc8", "error")):
        lab = to_lab(fill)
        assert ciede2000(lab, to_lab(tint(severities[name], lab[0]))) < MIN_FROM_SEVERITY
