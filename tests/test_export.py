"""Parameter sheets (CSV, XLSX, JSON) and the per-cell PDF report."""

from __future__ import annotations

import copy
import csv
import json
import math

import pytest

from passivefit.export.sheets import write_sheet
from passivefit.model.provenance import flags_text, settings_hash, unit_of

SETTINGS = {"components": "auto", "fit_start_ms": None, "sweeps": None, "step": None}


def example_result(name: str = "LOL-2026-11-03-c1", *, tau0_ms: float = 22.0,
                   tau1_ms: float = 2.2, r_in_MOhm: float = 113.0, n_sweeps: int = 4,
                   reject: int | None = 3, digest: str | None = None) -> dict:
    """A `RecordingResult.to_dict()` object of the invented Lindqvist-Okafor lab.

    Values are in the range of CA1 pyramidal cells (docs/references.md §8, Pike et al.
    2000 [pub]); L_cyl follows from τ0/τ1 by the equivalent-cylinder relation
    (docs/references.md §2, Rall 1969 [pub]) so the object is self-consistent.
    """
    L_cyl = math.pi / math.sqrt(tau0_ms / tau1_ms - 1.0)
    sweeps = []
    for k in range(n_sweeps):
        accepted = k != reject
        sweeps.append({
            "index": k, "accepted": accepted,
            "reject_reason": None if accepted else "baseline drift 1.8 mV > 1.0 mV",
            "step_pA": -50.0 + 10.0 * k, "v_rest_mV": -66.4 + 0.05 * k,
            "r_in_MOhm": r_in_MOhm * (1 + 0.01 * k), "tau0_ms": tau0_ms * (1 - 0.005 * k),
            "tau1_ms": tau1_ms * (1 + 0.02 * k), "c0_mV": -5.1 + 1.0 * k,
            "c1_mV": -0.45 + 0.1 * k, "rmse_mV": 0.081,
            "flags": [] if accepted else ["BASELINE_DRIFT"],
        })
    return _rounded({
        "passivefit_version": "0.1.0",
        "source": {"path": f"/data/lol/2026-11-03/{name}.abf",
                   "sha256": digest or (name.encode().hex() * 8)[:64],
                   "format": "abf", "sweep_count": n_sweeps},
        "settings": dict(SETTINGS),
        "cell": {
            "v_rest_mV": -66.3, "r_in_MOhm": r_in_MOhm, "tau0_ms": tau0_ms,
            "tau0_ci95_ms": [tau0_ms * 0.97, tau0_ms * 1.03], "tau1_ms": tau1_ms,
            "tau1_ci95_ms": [tau1_ms * 0.8, tau1_ms * 1.25], "c0_mV": -4.6, "c1_mV": -0.41,
            "L_cyl": L_cyl, "L_bs": 0.9 * L_cyl, "L_ci95": [0.8 * L_cyl, 1.05 * L_cyl],
            "rho": 4.2, "rho_ci95": None, "c_tau_pF": tau0_ms / r_in_MOhm * 1e3,
            "c_total_pF": 1.12 * tau0_ms / r_in_MOhm * 1e3, "sag_ratio": 0.97,
            "n_sweeps_used": n_sweeps - (reject is not None),
        },
        "sweeps": sweeps,
        "flags": [{"code": "RHO_CI_UNAVAILABLE", "message": "too few sweeps for a rho interval"},
                  {"code": "SEAL_CHECK", "message": "holding current drifted", "value": -31.5}],
    })


def _rounded(value):
    """Floats to 6 significant digits, as `to_dict()` reports them."""
    if isinstance(value, dict):
        return {k: _rounded(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_rounded(v) for v in value]
    return float(f"{value:.6g}") if isinstance(value, float) else value


def _number(text: str):
    return None if text == "" else float(text)


@pytest.fixture
def results():
    return [example_result(), example_result("LOL-2026-11-04-c2", tau0_ms=31.0, tau1_ms=4.1,
                                             r_in_MOhm=292.0, n_sweeps=3, reject=None)]


def test_csv_cells_and_sweeps_read_back(tmp_path, results):
    written = write_sheet(results, tmp_path / "cells.csv")
    assert [p.name for p in written] == ["cells.csv", "cells_sweeps.csv"]
    with open(written[0], newline="") as f:
        cells = list(csv.DictReader(f))
    with open(written[1], newline="") as f:
        sweeps = list(csv.DictReader(f))
    assert len(cells) == 2 and len(sweeps) == 4 + 3
    for row, result in zip(cells, results, strict=True):
        assert row["source_path"] == result["source"]["path"]
        assert row["source_sha256"] == result["source"]["sha256"]
        for key in ("v_rest_mV", "r_in_MOhm", "tau0_ms", "tau1_ms", "L_cyl", "L_bs",
                    "c_total_pF", "sag_ratio", "n_sweeps_used"):
            assert _number(row[key]) == result["cell"][key], key  # repr round trip: exact
        assert [_number(row["tau0_ci95_ms_lo"]), _number(row["tau0_ci95_ms_hi"])] == \
            result["cell"]["tau0_ci95_ms"]
        assert row["rho_ci95"] == ""  # null interval: empty, not "None"
        assert row["flags"] == ("RHO_CI_UNAVAILABLE: too few sweeps for a rho interval; "
                                "SEAL_CHECK: holding current drifted")
        assert row["settings_hash"] == settings_hash(result["settings"])
    first = [s for s in sweeps if s["source_path"] == results[0]["source"]["path"]]
    assert [int(s["index"]) for s in first] == [0, 1, 2, 3]
    assert [s["accepted"] for s in first] == ["true", "true", "true", "false"]
    assert first[3]["reject_reason"] == "baseline drift 1.8 mV > 1.0 mV"
    assert first[3]["flags"] == "BASELINE_DRIFT"
    assert _number(first[2]["tau1_ms"]) == results[0]["sweeps"][2]["tau1_ms"]


def test_tsv_uses_tabs(tmp_path, results):
    cells_path, sweeps_path = write_sheet(results, tmp_path / "out.tsv")
    assert sweeps_path.name == "out_sweeps.tsv"
    header = cells_path.read_text().splitlines()[0].split("\t")
    assert header[:3] == ["source_path", "source_sha256", "source_format"]


def test_xlsx_sheets_units_and_values(tmp_path, results):
    from openpyxl import load_workbook

    (path,) = write_sheet(results, tmp_path / "cells.xlsx",
                          annotations=[{"cell_id": "LOL-2026-11-03-c1", "region": "CA1"},
                                       {"cell_id": "LOL-2026-11-04-c2", "region": "DG"}])
    book = load_workbook(path, read_only=True)
    assert book.sheetnames == ["cells", "sweeps", "flags", "provenance"]
    rows = list(book["cells"].iter_rows(values_only=True))
    header, units, data = rows[0], rows[1], rows[2:]
    unit = dict(zip(header, units, strict=True))
    assert unit["r_in_MOhm"] == "MΩ" and unit["tau0_ci95_ms_hi"] == "ms"
    assert unit["c_total_pF"] == "pF" and unit["v_rest_mV"] == "mV"
    assert unit["L_cyl"] is None and unit["rho"] is None  # dimensionless: empty unit cell
    assert len(data) == 2
    for values, result in zip(data, results, strict=True):
        row = dict(zip(header, values, strict=True))
        assert row["source_path"] == result["source"]["path"]
        assert row["tau0_ms"] == result["cell"]["tau0_ms"]
        assert row["L_ci95_lo"] == result["cell"]["L_ci95"][0]
        assert row["rho_ci95"] is None
    assert dict(zip(header, data[1], strict=True))["region"] == "DG"

    sweep_rows = list(book["sweeps"].iter_rows(values_only=True))
    sweep_header = sweep_rows[0]
    assert dict(zip(sweep_header, sweep_rows[1], strict=True))["step_pA"] == "pA"
    assert len(sweep_rows) - 2 == 7

    prov = list(book["provenance"].iter_rows(values_only=True))
    prov_row = dict(zip(prov[0], prov[2], strict=True))
    assert json.loads(prov_row["settings"]) == results[0]["settings"]
    assert prov_row["passivefit_version"] == "0.1.0"
    assert prov_row["source_sha256"] == results[0]["source"]["sha256"]

    flag_rows = list(book["flags"].iter_rows(values_only=True))[2:]
    assert ("SEAL_CHECK", -31.5) in {(r[1], r[3]) for r in flag_rows}


def test_json_is_the_list_of_results(tmp_path, results):
    original = copy.deepcopy(results)
    (path,) = write_sheet(results, tmp_path / "all.json")
    assert json.loads(path.read_text()) == original
    assert results == original  # the input is not modified


def test_json_carries_annotations(tmp_path, results):
    (path,) = write_sheet(results, tmp_path / "all.json",
                          annotations=[{"region": "CA1"}, {"region": "DG"}])
    loaded = json.loads(path.read_text())
    assert [r["annotations"]["region"] for r in loaded] == ["CA1", "DG"]
    assert loaded[0]["cell"] == results[0]["cell"]


def test_unknown_extension_is_a_clear_error(tmp_path, results):
    with pytest.raises(ValueError, match=r"unknown sheet type '\.ods'.*\.xlsx"):
        write_sheet(results, tmp_path / "cells.ods")
    assert not list(tmp_path.iterdir())


def test_annotations_must_match_results(tmp_path, results):
    with pytest.raises(ValueError, match="1 annotations given for 2 results"):
        write_sheet(results, tmp_path / "c.csv", annotations=[{"region": "CA1"}])


def test_units_from_key_names():
    assert [unit_of(k) for k in ("tau0_ms", "tau0_ci95_ms_lo", "r_in_MOhm", "c_tau_pF",
                                 "step_pA", "temperature_C", "L_bs", "n_sweeps_used")] == \
        ["ms", "ms", "MΩ", "pF", "pA", "°C", "", ""]


def test_settings_hash_is_canonical():
    a = {"components": "auto", "fit_start_ms": 0.5}
    b = {"fit_start_ms": 0.5, "components": "auto"}
    assert settings_hash(a) == settings_hash(b)
    assert settings_hash(a) != settings_hash({**a, "fit_start_ms": 0.6})
    assert len(settings_hash(a)) == 16


def test_settings_hash_matches_the_settings_object():
    # The database skips analyses by this hash; it must equal the one batch computes.
    from passivefit.analysis import Settings
    from passivefit.io.recording import StepSpec

    for settings in (Settings(), Settings(components="2", fit_start_ms=0.8,
                                          step=StepSpec(0.1, 0.3, -40e-12), sweeps=(0, 2))):
        assert settings_hash(settings.to_dict()) == settings.settings_hash()


def test_flags_text_accepts_objects_and_codes():
    assert flags_text([{"code": "A", "message": "m"}, "B", {"code": "C"}]) == "A: m; B; C"
    assert flags_text([]) == ""


# ---------------------------------------------------------------------------- PDF report
def _pdf_pages(path) -> int:
    import re

    return len(re.findall(rb"/Type /Page[^s]", path.read_bytes()))


@pytest.fixture(scope="module")
def analysed_cell():
    from passivefit.analysis import Settings, analyze
    from passivefit.simulate import BallStick, StepProtocol, simulate_recording

    cell = BallStick.from_electrotonic(0.024, 0.95, 2.0, 140e6)
    recording, _ = simulate_recording(
        cell, protocol=StepProtocol(0.05, 0.25, (-50e-12, -30e-12, -10e-12, 10e-12)),
        sample_rate_hz=10_000, sweep_duration_s=0.4, n_sweeps=8, filter_hz=2_000, seed=7,
        cell_id="LOL-2026-11-12-c3", metadata={"region": "CA3", "cell_type": "pyramidal"})
    return recording, analyze(recording, Settings())


def test_report_pages_per_cell(tmp_path, analysed_cell):
    from passivefit.export.report import write_report

    path = write_report([analysed_cell, analysed_cell], tmp_path / "cells.pdf")
    assert path.read_bytes()[:5] == b"%PDF-"
    assert _pdf_pages(path) == 4  # figures + values page, for each of the two cells


def test_report_without_a_cell_fit_still_renders(tmp_path, analysed_cell):
    from passivefit.analysis import Settings, analyze
    from passivefit.export.report import write_report

    recording, _ = analysed_cell
    everything_rejected = Settings(decisions=tuple((s.index, False, "test: reviewer rejected")
                                                   for s in recording.sweeps))
    result = analyze(recording, everything_rejected)
    assert result.cell_fit is None and result.to_dict()["cell"]["tau0_ms"] is None
    path = write_report([(recording, result)], tmp_path / "empty.pdf")
    assert _pdf_pages(path) == 2


def test_report_text_flows_onto_more_pages(tmp_path, analysed_cell, monkeypatch):
    from passivefit.export import report

    recording, result = analysed_cell
    data = result.to_dict()
    data["flags"] = [{"code": f"test.flag{k}", "message": "a long reason " * 8, "value": k}
                     for k in range(60)]
    monkeypatch.setattr(type(result), "to_dict", lambda self: data)
    path = report.write_report([(recording, result)], tmp_path / "long.pdf")
    assert _pdf_pages(path) >= 3  # nothing is cut off at the page bottom
    lines = report._flag_lines(data)
    assert lines[5].startswith("[test.flag5] a long reason") and lines[5].endswith("(value 5)")


def test_report_values_show_ci_and_missing_values():
    from passivefit.export.report import _value_rows

    cell = example_result()["cell"] | {"tau0_ci95_ms": 0.41, "rho": None}
    rows = {label: (text, unit) for label, text, unit in _value_rows(cell)}
    assert rows["Membrane time constant τ0"] == ("22 ± 0.41", "ms")
    assert rows["ρ, ball-and-stick"][0] == "— (not estimable: see flags)"
    assert rows["Input resistance R_in"] == ("113", "MΩ")


def test_report_needs_a_pdf_name(tmp_path, analysed_cell):
    from passivefit.export.report import write_report

    with pytest.raises(ValueError, match=r"the report is a PDF; give a file ending in \.pdf"):
        write_report([analysed_cell], tmp_path / "cells.png")


def test_report_says_how_the_values_were_found():
    from passivefit.export.report import _more_rows, _sweep_lines, _value_rows

    cell = example_result()["cell"] | {"bridge_MOhm": 8.2, "bridge_ci95_MOhm": 2.1,
                                       "fit_start_ms": 2.14, "r_in_method": "V-I slope",
                                       "tau1_source": "ball-and-stick fit"}
    rows = {label: text for label, text, _ in _value_rows(cell) + _more_rows(cell)}
    assert rows["Bridge jump at the step edge"] == "8.2 ± 2.1"
    assert rows["fit start"] == "2.14" and rows["R_in from"] == "V-I slope"
    assert rows["τ1 from"] == "ball-and-stick fit"
    sweeps = [{"index": 0, "accepted": False, "reject_reason": "noisy", "step_pA": -50},
              {"index": 1, "accepted": False, "reject_reason": "action potential"}]
    lines = _sweep_lines(sweeps, by_hand={0})
    assert "rejected by hand: noisy" in lines[1]
    assert "by hand" not in lines[2] and "rejected: action potential" in lines[2]


def test_report_writes_long_reasons_out_below_the_sweep_table():
    # a reason too long for the table's status column is not cut ("rejected: action
    # [...]" had been all a reader saw): the table says "(below)", and the reasons follow,
    # one line per reason with its sweeps
    from passivefit.export.report import _reason_lines, _sweep_lines

    why = "action potential during the step (peak +{} mV at {} ms)"
    sweeps = [{"index": k, "accepted": False, "reject_reason": why.format(50 + k, 200 - k)}
              for k in (6, 7)] + [{"index": 8, "accepted": True, "reject_reason": None}]
    lines = _sweep_lines(sweeps, status_width=22)
    assert lines[1].endswith("rejected (below)") and lines[3].endswith("ok")
    assert _reason_lines(sweeps, set(), 22) == [
        "sweeps 6, 7: rejected: action potential during the step"]


@pytest.mark.slow
def test_a_long_pulse_recording_keeps_to_two_pages(tmp_path):
    """30 sweeps of the bundled pulse sample: figures page plus one page of numbers."""
    from passivefit.analysis import analyze
    from passivefit.export.report import write_report
    from passivefit.io import load
    from passivefit.samples import REPO_SAMPLES

    recording = load(REPO_SAMPLES / "LOL-2026-11-19-c4_L5-pulses.nwb")
    path = write_report([(recording, analyze(recording))], tmp_path / "l5.pdf")
    assert _pdf_pages(path) == 2


# ---------------------------------------------------------------- text that looks like a formula

FORMULAS = ["=HYPERLINK(\"http://x\",\"y\")", "+1+2", "-3+4", "@SUM(A1)", "\tlead", "\rlead"]


def _with_formula_notes(results):
    """The results with text cells that a spreadsheet would read as formulas."""
    return [copy.deepcopy(r) | {"source": r["source"] | {"path": text}}
            for r, text in zip(results, FORMULAS, strict=False)]


def test_csv_text_that_looks_like_a_formula_is_escaped(tmp_path, results):
    tricky = _with_formula_notes(results)
    notes = [{"notes": "=1+1", "region": "CA1"}, {"notes": "@cmd", "region": "DG"}]
    cells_path, _ = write_sheet(tricky, tmp_path / "cells.csv", annotations=notes)
    with open(cells_path, newline="") as f:
        rows = list(csv.DictReader(f))
    assert [r["notes"] for r in rows] == ["'=1+1", "'@cmd"]
    assert [r["region"] for r in rows] == ["CA1", "DG"]
    assert [r["source_path"] for r in rows] == ["'" + t for t in FORMULAS[:2]]
    # numbers stay numbers, negative ones included
    assert float(rows[0]["v_rest_mV"]) == results[0]["cell"]["v_rest_mV"] < 0


def test_xlsx_text_that_looks_like_a_formula_stays_text(tmp_path, results):
    from openpyxl import load_workbook

    tricky = _with_formula_notes(results)
    notes = [{"notes": "=1+1"}, {"notes": "-2+3"}]
    (path,) = write_sheet(tricky, tmp_path / "cells.xlsx", annotations=notes)
    sheet = load_workbook(path)["cells"]
    header = [c.value for c in sheet[1]]
    for row, note, text in zip(sheet.iter_rows(min_row=3), ["=1+1", "-2+3"], FORMULAS,
                               strict=False):
        cells = dict(zip(header, row, strict=True))
        assert cells["notes"].value == note and cells["notes"].data_type == "s"
        assert cells["source_path"].value == text and cells["source_path"].data_type == "s"
        assert cells["v_rest_mV"].data_type == "n"
    assert not any(c.data_type == "f" for line in sheet.iter_rows() for c in line)


def test_wide_intervals_are_written_without_an_exponent():
    """Two significant digits, as a reader writes them: '± 240', not '± 2.4e+02'."""
    from passivefit.model.schema import L_BS, L_CI_HIGH, L_CI_LOW, R_IN, R_IN_CI, uncertainty_text

    cell = {R_IN.key: 278.4, R_IN_CI.key: 245.0, L_BS.key: 1.1, L_CI_LOW.key: 0.0123,
            L_CI_HIGH.key: 1530.0}
    assert uncertainty_text(cell, R_IN) == " ± 240"
    assert uncertainty_text(cell, L_BS) == " (0.012–1500)"


def test_a_narrow_interval_shows_its_width():
    """An interval whose ends round alike at two digits (1.3–1.3) is written with the
    decimals that show its width to two digits; ends of like size share their decimals."""
    from passivefit.model.schema import L_BS, L_CI_HIGH, L_CI_LOW, uncertainty_text

    cell = {L_BS.key: 1.309, L_CI_LOW.key: 1.2861, L_CI_HIGH.key: 1.3338}
    assert uncertainty_text(cell, L_BS) == " (1.286–1.334)"
    # ends of like size share their decimals: 3.0–3.1 and 0.88–1.10, not 3–3.1, 0.88–1.1
    cell = {L_BS.key: 1.0, L_CI_LOW.key: 0.88, L_CI_HIGH.key: 1.1}
    assert uncertainty_text(cell, L_BS) == " (0.88–1.10)"
    cell = {L_BS.key: 3.033, L_CI_LOW.key: 3.0, L_CI_HIGH.key: 3.1}
    assert uncertainty_text(cell, L_BS) == " (3.0–3.1)"
