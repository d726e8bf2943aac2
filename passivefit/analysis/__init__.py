"""Recording + Settings → RecordingResult, as small stages (see `pipeline`).

- `windows`: each sweep's step and the windows every measurement reads;
- `fits`: exponential fits of the transients, residuals, the fit-start scan;
- `sweep`: one sweep's measurements and rejection tests;
- `pool`: the accepted sweeps combined, and the first look at them;
- `cable`: the ball-and-stick fit, bridge, L, ρ and capacitances;
- `uncertainty`: bootstrap CIs;
- `checks`: R_in, sag and the quality checks of the cell;
- `pipeline`: `analyze()`, reading top to bottom.
"""

from passivefit.analysis.fits import residual
from passivefit.analysis.pipeline import analyze
from passivefit.analysis.sweep import analyze_sweep
from passivefit.analysis.windows import sweep_steps
from passivefit.model.results import CellResult, GroupAverage, RecordingResult, Segment, SweepFit
from passivefit.model.settings import Settings, Windows

__all__ = ["CellResult", "GroupAverage", "RecordingResult", "Segment", "Settings", "SweepFit",
           "Windows", "analyze", "analyze_sweep", "residual", "sweep_steps"]
