"""Write the recorded results of the bundled samples that tests/test_architecture.py
compares against. Run it only when a change of results is intended, and say why in the
commit: `python tests/data/golden/record.py`."""

from __future__ import annotations

import json
from pathlib import Path

from passivefit.analysis import analyze
from passivefit.io import load
from passivefit.io.recording import StepSpec
from passivefit.model.settings import Settings

HERE = Path(__file__).resolve().parent
SAMPLES = HERE.parents[2] / "sample_recordings"
NO_COMMAND = {"LOL-2026-11-12-c3_CA3.abf": StepSpec(0.1, 0.3, -40e-12)}  # as the README says


def main() -> None:
    for path in sorted(p for p in SAMPLES.iterdir() if p.suffix in (".nwb", ".csv", ".abf")):
        step = NO_COMMAND.get(path.name)
        for suffix, settings in (("", Settings(step=step)),
                                 (".b0c2", Settings(step=step, bootstrap=0, components="2"))):
            data = analyze(load(path), settings).to_dict()
            data["source"]["path"] = f"sample_recordings/{path.name}"
            (HERE / f"{path.name}{suffix}.json").write_text(json.dumps(data, indent=2) + "\n")


if __name__ == "__main__":
    main()
