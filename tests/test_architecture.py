"""The layout's rules, checked on the source: layers, Qt only in the window, names only
in the schema, every flag code documented, behaviour kept on the samples."""

from __future__ import annotations

import ast
import json
import math
import re
from pathlib import Path

import pytest

from passivefit.model import schema as S

PACKAGE = Path(__file__).resolve().parents[1] / "passivefit"
ROOT = PACKAGE.parent

#: Layers from the top; a module may import only from its own package and from layers
#: below it. Packages sharing a layer must not import each other.
LAYERS = (
    ("cli",),
    ("gui",),
    ("watch",),
    ("batch",),
    ("export", "store", "samples"),
    ("analysis",),
    ("io", "simulate"),
    ("model",),
    ("core", "resources"),
)
LAYER_OF = {name: depth for depth, names in enumerate(LAYERS) for name in names}
TOP_LEVEL = {"__init__", "__main__"}   # the package itself: version, `python -m`
QT = ("PySide6", "pyqtgraph", "PyQt5", "PyQt6", "shiboken6")


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE).with_suffix("").parts
        yield path, parts[0]


def _imports(path: Path) -> list[str]:
    """Every module named by an import in `path`, at any depth (lazy imports too)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.append(node.module)
    return names


def test_layers_point_down():
    wrong = []
    for path, part in _modules():
        if part in TOP_LEVEL:
            continue
        assert part in LAYER_OF, f"{path}: place `{part}` in a layer of this test"
        for name in _imports(path):
            if not name.startswith("passivefit."):
                continue
            target = name.split(".")[1]
            if target == part or target == "__init__":
                continue
            if target not in LAYER_OF or LAYER_OF[target] <= LAYER_OF[part]:
                wrong.append(f"{path.relative_to(ROOT)} imports {name}")
    assert not wrong, "imports that point up or sideways:\n" + "\n".join(wrong)


def test_every_package_is_installed():
    """pyproject.toml lists the packages (resources/ is mapped in): none may be missing."""
    import tomllib

    listed = set(tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
                 ["packages"])
    found = {".".join(p.parent.relative_to(ROOT).parts) for p in PACKAGE.rglob("__init__.py")}
    assert found | {"passivefit.resources"} == listed


def test_qt_only_in_the_window():
    wrong = [f"{path.relative_to(ROOT)} imports {name}" for path, part in _modules()
             if part != "gui" for name in _imports(path) if name.split(".")[0] in QT]
    assert not wrong, "\n".join(wrong)


# Keys that are ordinary words as well (an `index` of anything, `accepted`, `flags`, and
# `rho`, which also names the bootstrap's samples) are not searched for; every other key
# and every flag code must come from the schema.
GENERIC = {"index", "accepted", "flags", "rho"}


def test_no_key_or_flag_code_outside_the_schema():
    names = {q.key for q in S.BY_KEY.values()} - GENERIC
    names |= set(S.FLAGS)
    alternatives = "|".join(map(re.escape, sorted(names)))
    literal = re.compile(r"""(?<![\w.])["'](""" + alternatives + r""")["']""")
    strays = []
    for path, part in _modules():
        if path.name == "schema.py" or part == "core":  # core lies below the schema and
            continue                                      # names only its own SI numbers
        for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            for match in literal.finditer(line):
                strays.append(f"{path.relative_to(ROOT)}:{number}: {match.group(0)}")
    assert not strays, "write these through passivefit.model.schema:\n" + "\n".join(strays)


def test_readme_lists_every_flag_code():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    assert S.flags_markdown() in readme, "paste schema.flags_markdown() into the README"


def test_flag_templates_fill_in():
    """Every message and every named variant formats with numbers (no stray braces)."""
    import string

    for spec in S.FLAGS.values():
        for reason in spec.reasons or (None,):
            texts = [spec.template, spec.reasons.get(reason, "")]
            names = {name for text in texts for _, name, _, _ in string.Formatter().parse(text)
                     if name and name != "reason"}
            flag = spec.make(1.0, reason=reason, **dict.fromkeys(names, 1.0))
            assert flag.code == spec.code and "{" not in flag.message


def test_quantity_display():
    assert S.TAU0.display(0.0221234567) == 22.1235   # s → ms, 6 significant digits
    assert S.R_IN.display(109.7e6) == 109.7
    assert S.TAU0.display(float("nan")) is None and S.TAU0.display(None) is None
    assert S.N_SWEEPS_USED.display(13.0) == 13 and S.TAU1_SOURCE.display("fit") == "fit"
    assert all(S.BY_KEY[q.ci].unit == q.unit for q in S.BY_KEY.values() if q.ci)


# ------------------------------------------------------------------ behaviour is kept
GOLDEN = ROOT / "tests" / "data" / "golden"


def _close(new, old, path=""):
    """Differences beyond round-off (1e-3 relative: display digits) between two results."""
    if isinstance(old, dict):
        out = [f"{path}.{k}: missing" for k in old if k not in new]
        return out + [d for k in old if k in new for d in _close(new[k], old[k], f"{path}.{k}")]
    if isinstance(old, list):
        if len(old) != len(new):
            return [f"{path}: {len(new)} items, was {len(old)}"]
        return [d for i, (a, b) in enumerate(zip(new, old, strict=True))
                for d in _close(a, b, f"{path}[{i}]")]
    if isinstance(old, float) and isinstance(new, float):
        return [] if math.isclose(new, old, rel_tol=1e-3, abs_tol=1e-9) else [
            f"{path}: {new} (was {old})"]
    return [] if new == old else [f"{path}: {new!r} (was {old!r})"]


@pytest.mark.slow
@pytest.mark.parametrize("golden", sorted(GOLDEN.glob("*.json")), ids=lambda p: p.stem)
def test_samples_give_the_recorded_results(golden):
    """The JSON of each bundled sample is the one recorded in tests/data/golden (written by
    `python tests/data/golden/record.py` when a change of results is intended)."""
    from passivefit.analysis import analyze
    from passivefit.io import load
    from passivefit.model.settings import Settings

    old = json.loads(golden.read_text())
    settings = Settings.from_dict(old["settings"])
    new = analyze(load(ROOT / "sample_recordings" / Path(old["source"]["path"]).name),
                  settings).to_dict()
    new["source"]["path"] = old["source"]["path"]
    differences = _close(new, old)
    assert not differences, "\n".join(differences[:20])


#: the command line of each golden file's settings (the CA3 sample has no command channel)
_GOLDEN_ARGS = {"": [], ".b0c2": ["--bootstrap", "0", "--components", "2"]}
_GOLDEN_STEP = {"LOL-2026-11-12-c3_CA3.abf": ["--step", "100", "300", "-40"]}


@pytest.mark.slow
@pytest.mark.parametrize("golden", sorted(GOLDEN.glob("*.json")), ids=lambda p: p.stem)
def test_command_json_gives_the_recorded_results(golden, capsys):
    """`passivefit analyze --json` prints, for each bundled sample, the values recorded in
    tests/data/golden to round-off (the same comparison as above, through the command)."""
    from passivefit.cli import main

    old = json.loads(golden.read_text())
    name = Path(old["source"]["path"]).name
    suffix = golden.name[len(name):-len(".json")]
    argv = ["analyze", str(ROOT / "sample_recordings" / name), "--json",
            *_GOLDEN_STEP.get(name, []), *_GOLDEN_ARGS[suffix]]
    assert main(argv) == 0
    new = json.loads(capsys.readouterr().out)
    assert new["settings"] == old["settings"]
    new["source"]["path"] = old["source"]["path"]
    differences = _close(new, old)
    assert not differences, "\n".join(differences[:20])
