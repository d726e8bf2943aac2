"""The `passivefit` command: the JSON contract (README, "The JSON result"), one-line errors."""

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

import passivefit
from passivefit.cli import main
from passivefit.model.schema import CELL_CORE

SAMPLES = Path(__file__).resolve().parent.parent / "sample_recordings"
CA1 = SAMPLES / "LOL-2026-11-03-c1_CA1.nwb"
SWEEP_KEYS = {"index", "accepted", "reject_reason", "step_pA", "v_rest_mV", "r_in_MOhm",
              "tau0_ms", "tau1_ms", "c0_mV", "c1_mV", "rmse_mV", "flags"}


def run_cli(*args, **kw):
    return subprocess.run([sys.executable, "-m", "passivefit.cli", *map(str, args)],
                          capture_output=True, text=True, timeout=300, **kw)


@pytest.fixture(scope="module")
def ca1_json():
    proc = run_cli("analyze", CA1, "--json")
    assert proc.returncode == 0, proc.stderr
    return json.loads(proc.stdout)


def test_analyze_json_follows_the_contract(ca1_json):
    # the contract's keys, and the `design` block (what to record next) beside them
    assert set(ca1_json) == {"passivefit_version", "source", "settings", "cell", "sweeps", "flags",
                             "design"}
    assert set(ca1_json["source"]) == {"path", "sha256", "format", "sweep_count"}
    assert ca1_json["source"]["format"] == "nwb"
    assert ca1_json["source"]["sweep_count"] == 20
    assert {q.key for q in CELL_CORE} <= set(ca1_json["cell"])
    for sweep in ca1_json["sweeps"]:
        assert SWEEP_KEYS <= set(sweep)
    for flag in ca1_json["flags"]:
        assert {"code", "message"} <= set(flag)


def test_analyze_numbers_match_the_simulated_truth(ca1_json):
    truth = json.loads((SAMPLES / (CA1.name + ".truth.json")).read_text())
    cell = ca1_json["cell"]
    assert cell["v_rest_mV"] == pytest.approx(truth["v_rest_mV"], abs=0.5)
    assert cell["r_in_MOhm"] == pytest.approx(truth["r_in_MOhm"], rel=0.03)
    assert cell["tau0_ms"] == pytest.approx(truth["tau0_ms"], rel=0.03)
    assert cell["n_sweeps_used"] >= 10


def test_sweeps_option_and_out_file(tmp_path):
    out = tmp_path / "r.json"
    proc = run_cli("analyze", CA1, "--sweeps", "0-3,8", "--out", out)
    assert proc.returncode == 0, proc.stderr
    data = json.loads(out.read_text())
    assert [s["index"] for s in data["sweeps"]] == [0, 1, 2, 3, 8]
    assert "R_in" in proc.stdout and "τ0" in proc.stdout  # the human-readable table


def test_abf_without_command_needs_step_and_works_with_it():
    abf = SAMPLES / "LOL-2026-11-12-c3_CA3.abf"
    proc = run_cli("analyze", abf, "--json")
    assert proc.returncode == 2
    assert "--step" in proc.stderr and "Traceback" not in proc.stderr
    proc = run_cli("analyze", abf, "--json", "--step", "100", "300", "-40")
    assert proc.returncode == 0, proc.stderr
    truth = json.loads((SAMPLES / (abf.name + ".truth.json")).read_text())
    assert json.loads(proc.stdout)["cell"]["r_in_MOhm"] == pytest.approx(
        truth["r_in_MOhm"], rel=0.05)


BAD_INPUTS = {
    "missing.nwb": None,
    "empty.csv": b"",
    "garbage.abf": b"\x00\x01not an abf file at all" * 50,
    "garbage.nwb": b"definitely not hdf5" * 100,
    "notes.docx": b"PK\x03\x04 whatever",
    "nan.csv": b"time_ms,V0_mV,I0_pA\n" + b"".join(
        f"{k * 0.05:.2f},nan,0\n".encode() for k in range(400)),
}


@pytest.mark.parametrize("name", sorted(BAD_INPUTS))
def test_bad_input_exits_2_with_one_line(tmp_path, name):
    path = tmp_path / name
    if BAD_INPUTS[name] is not None:
        path.write_bytes(BAD_INPUTS[name])
    proc = run_cli("analyze", path, "--json")
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith(f"passivefit: error: {path}: ")
    assert proc.stdout == ""


def test_bad_options_are_one_line_errors(capsys):
    assert main(["analyze", str(CA1), "--step", "1", "2"]) == 2
    assert "--step" in capsys.readouterr().err
    assert main(["analyze", str(CA1), "--filter-hz", "-5"]) == 2
    assert "--filter-hz" in capsys.readouterr().err
    assert main(["analyze", str(CA1), "--sweeps", "a-b"]) == 2  # one line, not argparse's usage
    assert capsys.readouterr().err.strip().splitlines() == [
        "passivefit: error: `--sweeps` takes indices and ranges like 0-9,12 (0 to 100000), "
        "not 'a-b'"]


def test_analyze_never_imports_qt():
    code = (f"import sys; from passivefit.cli import main; main(['analyze', {str(CA1)!r}, "
            "'--json']); bad = [m for m in sys.modules if m.startswith(('PySide6', 'pyqtgraph'))]; "
            "sys.exit(1 if bad else 0)")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert proc.returncode == 0, proc.stderr


def test_the_command_asks_for_one_blas_thread_unless_the_user_chose(tmp_path):
    # numpy reads the thread count as it is imported, so the command sets it first
    code = ("import os, sys; from passivefit.cli import main; "
            "assert 'numpy' not in sys.modules; "
            f"main(['analyze', {str(tmp_path / 'missing.abf')!r}]); "
            "print(os.environ['OPENBLAS_NUM_THREADS'])")
    env = {k: v for k, v in os.environ.items() if k not in passivefit.BLAS_THREADS}
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert proc.returncode == 0 and proc.stdout.strip() == "1", proc.stderr
    env["OPENBLAS_NUM_THREADS"] = "3"   # the user's choice stands
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert proc.returncode == 0 and proc.stdout.strip() == "3", proc.stderr


def test_demo_writes_samples_with_truth(tmp_path):
    proc = run_cli("demo", tmp_path)
    assert proc.returncode == 0, proc.stderr
    written = sorted(p.name for p in tmp_path.iterdir())
    assert "LOL-2026-11-03-c1_CA1.nwb" in written
    assert "LOL-2026-11-03-c1_CA1.nwb.truth.json" in written
    assert len(written) == 8


def test_bootstrap_option_sets_the_ci_method(tmp_path):
    out = tmp_path / "r.json"
    proc = run_cli("analyze", CA1, "--bootstrap", "0", "--out", out)
    assert proc.returncode == 0, proc.stderr
    assert json.loads(out.read_text())["cell"]["ci_method"] == "fit covariance"
    proc = run_cli("analyze", CA1, "--bootstrap", "-1")
    assert proc.returncode == 2 and "bootstrap" in proc.stderr


def test_the_summary_says_where_its_intervals_and_r_in_come_from():
    from passivefit.analysis import analyze
    from passivefit.cli.analyze import format_table
    from passivefit.io import load
    from passivefit.model.settings import Settings

    text = format_table(analyze(load(CA1), Settings(bootstrap=0)).to_dict())
    # R_in's own interval is the V–I regression's, with the bridge's taken out of it
    assert ("± = 95 % CI (fit covariance; R_in's from the V–I regression and the bridge's) · "
            "R_in by V-I slope") in text


def test_the_table_says_when_an_accepted_sweep_has_no_tau0():
    # a sweep whose own τ0 interval is wider than τ0 shows "—": the status says why
    from passivefit.analysis import analyze
    from passivefit.cli.analyze import format_table
    from passivefit.io import load
    from passivefit.model.settings import Settings

    data = analyze(load(CA1), Settings(bootstrap=0)).to_dict()
    data["sweeps"][0]["tau0_ms"] = None
    lines = format_table(data).splitlines()
    header = next(i for i, line in enumerate(lines) if line.endswith("status"))
    rows = lines[header + 1: header + 1 + len(data["sweeps"])]
    assert "ok (τ0 not resolved in this sweep alone)" in rows[0]
    assert all("not resolved" not in row for row in rows[1:])
