"""The report's look: a colour-blind-safe palette for figures and the page's stylesheet.

Figures use the Okabe–Ito palette (Okabe & Ito 2008, *Color Universal Design*), which stays
distinguishable under the common colour-vision deficiencies; every mark also differs by shape or
line style so nothing is carried by colour alone. The page is plain HTML with one inline
stylesheet so the report is a single file that reads offline.
"""

from __future__ import annotations

__all__ = ["PALETTE", "LAW_COLOURS", "LAW_STYLES", "MARKERS", "LINESTYLES",
           "CSS", "family_colour"]

#: Okabe–Ito, black first (measured data is drawn in ink).
PALETTE = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky": "#56B4E9",
    "green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "purple": "#CC79A7",
}

#: Colour and line style of each fitted candidate law in curve figures.
LAW_COLOURS = {
    "power": PALETTE["blue"],
    "exponential": PALETTE["vermillion"],
    "stretched": PALETTE["purple"],
    "nlogn": PALETTE["green"],
    "powerlog": PALETTE["sky"],
}
LAW_STYLES = {"power": "-", "exponential": "--", "stretched": "-.", "nlogn": ":",
              "powerlog": "-"}

#: Order in which families take colours in comparison figures (yellow is left out: too pale on
#: white for a line).
_FAMILY_ORDER = ("blue", "vermillion", "green", "orange", "purple", "sky", "black")
MARKERS = ("o", "s", "D", "v", "P", "X", "*")
LINESTYLES = {"exact": "-", "sampling": "--"}


def family_colour(index: int) -> str:
    """The comparison-figure colour of the ``index``-th family (cycles after seven)."""
    return PALETTE[_FAMILY_ORDER[index % len(_FAMILY_ORDER)]]


CSS = """
:root { --ink:#1b2631; --muted:#5d6d7e; --rule:#d5d8dc; --paper:#fdfcf9; --band:#f4f1ea;
        --accent:#0072B2; --warn:#D55E00; }
* { box-sizing: border-box; }
body { margin:0; background:var(--paper); color:var(--ink);
       font: 15px/1.5 "DejaVu Sans", "Segoe UI", Helvetica, Arial, sans-serif; }
header.masthead { background:var(--ink); color:#fdfcf9; padding:18px 32px 14px; }
header.masthead h1 { margin:0; font-size:22px; letter-spacing:.02em; }
header.masthead .sub { color:#c8d1da; font-size:13px; margin-top:4px; }
nav.toc { background:var(--band); border-bottom:1px solid var(--rule); padding:8px 32px;
          font-size:13px; }
nav.toc a { color:var(--accent); margin-right:18px; text-decoration:none; }
main { padding:8px 32px 40px; max-width:1500px; }
section { margin-top:26px; }
h2 { font-size:18px; border-bottom:2px solid var(--ink); padding-bottom:3px; margin-bottom:10px; }
h3 { font-size:15px; margin:18px 0 6px; }
p.lead { font-size:16px; max-width:60em; }
.caution { border-left:5px solid var(--warn); background:#fff6ef; padding:8px 14px;
           max-width:60em; }
table { border-collapse:collapse; font-size:13px; }
th, td { border-bottom:1px solid var(--rule); padding:5px 8px; text-align:left;
         vertical-align:top; }
th { background:var(--band); font-weight:600; position:sticky; top:0; }
div.scroll { overflow-x:auto; max-width:100%; }
table.verdicts td.note { min-width:14em; max-width:22em; }
table.verdicts td.curve { font-family:"DejaVu Sans Mono", Menlo, monospace;
                          font-size:12px; }
.chip { display:inline-block; padding:1px 7px; border-radius:3px; font-weight:600; }
.chip.polynomial { background:#cfe6f5; }
.chip.exponential { background:#f7d9c4; }
.chip.inconclusive, .chip.none { background:#e6e6e6; }
.law { font-family:"DejaVu Sans Mono", Menlo, monospace; white-space:nowrap; }
.agree-agrees { color:#006644; font-weight:600; }
.agree-disagrees { color:var(--warn); font-weight:700; }
.agree-undecided, .agree-no-theory { color:var(--muted); }
.flag { display:block; color:var(--warn); font-size:12px; }
.muted { color:var(--muted); font-size:12px; }
figure.curve { margin:14px 0 26px; border:1px solid var(--rule); background:#fff; padding:10px;
               max-width:1240px; }
figure.curve img, figure.compare img { max-width:100%; height:auto; display:block; }
figure figcaption { font-size:13px; margin-top:6px; }
figure.compare { margin:14px 0 26px; border:1px solid var(--rule); background:#fff;
                 padding:10px; max-width:1240px; }
table.kv td:first-child { font-weight:600; white-space:nowrap; }
code, pre { font-family:"DejaVu Sans Mono", Menlo, monospace; font-size:12px; }
pre { background:var(--band); padding:10px; overflow:auto; max-height:28em; }
footer { color:var(--muted); font-size:12px; padding:16px 32px; border-top:1px solid var(--rule); }
"""
