"""The fixed files of resources/ are found and read (icon, palette, report texts)."""

import json
from pathlib import Path

from passivefit.resources import read_json, resource_path

ROOT = Path(__file__).resolve().parent.parent / "resources"


def test_palette_and_report_texts_come_from_the_resource_files():
    from passivefit.export.report import CAUTIONS
    from passivefit.gui import theme

    palette = json.loads((ROOT / "theme.json").read_text(encoding="utf-8"))
    assert read_json("theme.json") == palette
    assert theme.TEAL == palette["teal"] and theme.FAINT == tuple(palette["faint_rgba"])
    assert theme.VERDICT["none"] == tuple(palette["verdict"]["none"])
    assert palette["selection"] in theme.STYLE_SHEET
    texts = json.loads((ROOT / "report_texts.json").read_text(encoding="utf-8"))
    assert CAUTIONS.split("\n") == texts["cautions"]
    assert CAUTIONS.endswith("not for clinical or diagnostic use.")


def test_window_icon_is_set(qapp):
    from passivefit.gui.app import make_app

    assert resource_path("icon.svg").read_text(encoding="utf-8").startswith("<svg")
    icon = make_app().windowIcon()
    assert not icon.isNull() and not icon.pixmap(32, 32).isNull()
