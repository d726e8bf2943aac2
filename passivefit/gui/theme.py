"""Colours and the style sheet of the review window ("Slate and Paper", our own palette).

Warm paper background, slate ink, one teal for the sweep on screen and one
terracotta for the fitted model; windows are soft tints that never hide the trace.
"""

from __future__ import annotations

PAPER = "#f6f4ef"        # window background
CARD = "#ffffff"         # panels
INK = "#23272e"          # text, axes
MUTED = "#6b7280"        # secondary text
RULE = "#dedad2"         # panel borders
TEAL = "#11706b"         # the sweep on screen
TERRACOTTA = "#c4532f"   # fitted model
FAINT = (120, 134, 152, 70)     # other sweeps (RGBA)
FAINT_OUT = (196, 96, 80, 60)   # rejected sweeps (RGBA)
EDGE = "#9aa1ab"         # step edges

# window tints (RGBA): baseline, steady state, fit, decay (derived, not draggable)
REGION_TINT = {
    "baseline": (92, 138, 190, 46),
    "steady": (96, 160, 110, 46),
    "fit": (214, 160, 60, 52),
    "fit_off": (214, 160, 60, 26),
}
REGION_LINE = {
    "baseline": "#5c8abe",
    "steady": "#4f9a62",
    "fit": "#c28a2a",
    "fit_off": "#d8b77a",
}
REGION_LABEL = {"baseline": "baseline", "steady": "steady state", "fit": "fit",
                "fit_off": "decay fit"}

VERDICT = {   # (background, text)
    "clean": ("#dcefe2", "#1d5e36"),
    "notes": ("#f7e7c6", "#7a4d0b"),
    "none": ("#f5d9d2", "#8a2b17"),
    "busy": ("#e6e8ec", "#4b5563"),
}
ROW_REJECTED = "#fbeeea"
ROW_BY_HAND = "#eef5f4"

STYLE_SHEET = f"""
QMainWindow, QWidget#central {{ background: {PAPER}; }}
QWidget {{ color: {INK}; font-size: 10pt; }}
QFrame#card {{ background: {CARD}; border: 1px solid {RULE}; border-radius: 6px; }}
QLabel#cardTitle {{ color: {MUTED}; font-size: 9pt; font-weight: 600; }}
QLabel#fileName {{ font-size: 14pt; font-weight: 600; }}
QLabel#fileMeta {{ color: {MUTED}; }}
QLabel#value {{ font-size: 11pt; font-weight: 600; }}
QLabel#unit, QLabel#quantity {{ color: {MUTED}; }}
QLabel#notes {{ color: {INK}; }}
QLabel#verdict {{ border-radius: 11px; padding: 3px 12px; font-weight: 600; }}
QTableWidget {{ background: {CARD}; border: none; gridline-color: {RULE};
               selection-background-color: #cfe6e3; selection-color: {INK}; }}
QHeaderView::section {{ background: {CARD}; color: {MUTED}; border: none;
                       border-bottom: 1px solid {RULE}; padding: 3px 4px; font-size: 9pt; }}
QPushButton {{ background: {CARD}; border: 1px solid {RULE}; border-radius: 4px;
              padding: 3px 10px; }}
QPushButton:hover {{ border-color: {TEAL}; }}
QStatusBar {{ color: {MUTED}; }}
QFrame#helpCard {{ background: {CARD}; border-radius: 10px; }}
QLabel#key {{ background: #eceae4; border: 1px solid {RULE}; border-radius: 4px;
             padding: 1px 7px; font-family: monospace; }}
"""
