"""Colours and the style sheet of the review window ("Slate and Paper", our own palette).

Warm paper background, slate ink, one teal for the sweep on screen and one
terracotta for the fitted model; windows are soft tints that never hide the trace.
"""

from __future__ import annotations

from passivefit.resources import read_json

_PALETTE = read_json("theme.json")  # resources/theme.json
PAPER = _PALETTE["paper"]            # window background
CARD = _PALETTE["card"]              # panels
INK = _PALETTE["ink"]                # text, axes
MUTED = _PALETTE["muted"]            # secondary text
RULE = _PALETTE["rule"]              # panel borders
TEAL = _PALETTE["teal"]              # the sweep on screen
TERRACOTTA = _PALETTE["terracotta"]  # fitted model
FAINT = tuple(_PALETTE["faint_rgba"])          # other sweeps (RGBA)
# rejected sweeps (RGBA): a cool plum, never the fit's terracotta
FAINT_OUT = tuple(_PALETTE.get("faint_out_plum_rgba", (122, 92, 168, 75)))
EDGE = _PALETTE["edge"]              # step edges

# window tints (RGBA): baseline, steady state, fit, decay (derived, not draggable)
REGION_TINT = {name: tuple(rgba) for name, rgba in _PALETTE["region_tint_rgba"].items()}
REGION_LINE = dict(_PALETTE["region_line"])
REGION_LABEL = {"baseline": "baseline", "steady": "steady state", "fit": "fit",
                "fit_off": "decay fit"}

VERDICT = {kind: tuple(pair) for kind, pair in _PALETTE["verdict"].items()}  # (background, text)
ROW_REJECTED = _PALETTE["row_rejected"]
ROW_BY_HAND = _PALETTE["row_by_hand"]
ROW_OWN_WINDOWS = _PALETTE.get("row_own_windows", "#f6efdc")   # a sweep with its own windows

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
               selection-background-color: {_PALETTE['selection']}; selection-color: {INK}; }}
QHeaderView::section {{ background: {CARD}; color: {MUTED}; border: none;
                       border-bottom: 1px solid {RULE}; padding: 3px 4px; font-size: 9pt; }}
QPushButton {{ background: {CARD}; border: 1px solid {RULE}; border-radius: 4px;
              padding: 3px 10px; }}
QPushButton:hover {{ border-color: {TEAL}; }}
QStatusBar {{ color: {MUTED}; }}
QLabel#banner {{ background: {VERDICT['none'][0]}; color: {VERDICT['none'][1]};
                border-radius: 4px; padding: 3px 8px; }}
QTabWidget::pane {{ border: none; }}
QFrame#helpCard {{ background: {CARD}; border-radius: 10px; }}
QLabel#key {{ background: {_PALETTE['key_cap']}; border: 1px solid {RULE}; border-radius: 4px;
             padding: 1px 7px; font-family: monospace; }}
"""
