"""One answer whatever the options: R_in, the bridge and τ1 from the model of the whole
measurement chain (cell, bridge jump with the electrode's lag, the amplifier's filter)."""

from __future__ import annotations

import numpy as np
import pytest

from passivefit.analysis import Settings, analyze
from passivefit.core.lowpass import Lowpass
from passivefit.io import load
from passivefit.samples import bundled_sample
from passivefit.simulate import BallStick, StepProtocol, simulate_recording

STEPS = StepProtocol(0.1, 0.4, (-50e-12, -30e-12))


# --------------------------------------------------------------------------- the filter
@pytest.mark.parametrize("rate", [0.0, 50.0, 3_000.0, 40_000.0])
def test_lowpass_response_is_the_analog_filters(rate):
    # against scipy's own design of the analog 4-pole Bessel and its linear simulation
    # (scipy.signal.bessel, scipy.signal.lsim: an outside reference for the partial
    # fractions of core.lowpass)
    from scipy.signal import bessel, lsim

    t = np.linspace(0.0, 4e-3, 40_001)
    b, a = bessel(4, 2 * np.pi * 5_000.0, "low", analog=True, norm="mag")
    _, expected, _ = lsim((b, a), np.exp(-rate * t), t)
    got = Lowpass(5_000.0).response([rate], [1.0], t)
    np.testing.assert_allclose(got, expected, atol=1e-6)  # lsim interpolates linearly
    assert got[0] == 0.0  # the filtered response starts continuously at the edge


@pytest.mark.parametrize("n", [64, 255, 256])
def test_noise_spectrum_is_welchs(n):
    # core.lowpass computes Welch's periodogram itself (numpy only); against scipy's
    # (scipy.signal.welch, linear detrend, Hann window, half overlap: an outside reference),
    # equal to a constant factor, which the corner search does not see
    from scipy.signal import welch

    from passivefit.core.lowpass import _welch

    x = np.random.default_rng(3).normal(size=3_000).cumsum() * 0.01
    ratio = welch(x, fs=1.0, nperseg=n, detrend="linear")[1] / _welch(x, n)
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-10)


def test_lowpass_group_delay():
    # 4-pole Bessel low-frequency group delay 0.336/fc (from memory, textbook value)
    assert Lowpass(2_000.0).group_delay_s() == pytest.approx(0.336 / 2_000.0, rel=0.002)


# ------------------------------------------------------------------ one R_in, any options
@pytest.fixture(scope="module")
def ca1():
    return load(bundled_sample())


def _cell(recording, **settings):
    return analyze(recording, Settings(**settings)).to_dict()["cell"]


def test_r_in_is_one_value_whatever_the_fit_start_components_or_bootstrap(ca1):
    # the CA1 sample (simulated: R_in 110 MΩ, an 8 MΩ bridge error through a 50 µs lag)
    reference = _cell(ca1, bootstrap=0)
    r_in, ci = reference["r_in_MOhm"], reference["r_in_ci95_MOhm"]
    assert reference["bridge_applied"] is True
    assert r_in == pytest.approx(110.0, abs=ci)
    assert reference["r_in_raw_MOhm"] - r_in == pytest.approx(reference["bridge_MOhm"], rel=1e-3)
    variants = [dict(fit_start_ms=ms, bootstrap=0) for ms in (1.0, 2.0, 3.5, 5.0)]
    variants += [dict(components=n, bootstrap=0) for n in ("1", "2", "3")]
    variants += [dict(bootstrap=40)]
    # ρ from the amplitudes, (V_inf − B0)/(B0 L coth L − V_inf) (Rall's step amplitudes,
    # docs/references.md §3), agrees with the time course's ρ and the sample's truth (ρ = 5)
    assert reference["rho_amplitude"] == pytest.approx(5.0, rel=0.15)
    assert reference["rho_amplitude"] == pytest.approx(reference["rho"], rel=0.15)
    for options in variants:
        cell = _cell(ca1, **options)
        assert abs(cell["r_in_MOhm"] - r_in) < ci, options
        assert cell["bridge_applied"] is True, options


# ------------------------------------------------------------- simulated measurement chains
def _simulated(bridge_ohm: float, lag_s: float, stated: bool, seed: int = 3):
    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    rec, truth = simulate_recording(cell, protocol=STEPS, n_sweeps=20, sweep_duration_s=0.8,
                                    noise_sd_V=0.2e-3, filter_hz=5_000, bridge_ohm=bridge_ohm,
                                    electrode_tau_s=lag_s, seed=seed)
    if not stated:
        rec.metadata["filter_hz"] = None
    return analyze(rec, Settings(bootstrap=0)).to_dict(), truth


def test_a_12_megohm_bridge_with_80_us_lag_is_found_and_taken_out():
    data, truth = _simulated(12e6, 80e-6, stated=True)
    cell = data["cell"]
    assert cell["r_in_MOhm"] == pytest.approx(truth["r_in_MOhm"], rel=0.02)
    assert abs(cell["bridge_MOhm"] - 12.0) <= cell["bridge_ci95_MOhm"]
    assert cell["bridge_applied"] is True
    assert cell["r_in_raw_MOhm"] == pytest.approx(122.0, rel=0.02)
    # at 20 kHz behind a 5 kHz filter the 80 µs lag is not determined (its CI is wider than
    # itself): it is not reported
    assert cell.get("electrode_lag_us") is None


def test_a_lag_the_data_determine_is_reported_with_its_interval():
    # a 30 MΩ bridge error through a 150 µs lag, sampled at 50 kHz behind a 10 kHz filter
    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    rec, _ = simulate_recording(cell, protocol=STEPS, n_sweeps=20, sweep_duration_s=0.8,
                                sample_rate_hz=50_000, noise_sd_V=0.2e-3, filter_hz=10_000,
                                bridge_ohm=30e6, electrode_tau_s=150e-6, seed=3)
    data = analyze(rec, Settings(bootstrap=0)).to_dict()["cell"]
    assert abs(data["electrode_lag_us"] - 150.0) <= data["electrode_lag_ci95_us"] < 150.0


def test_a_clean_cell_with_an_unstated_filter_gets_no_bridge():
    data, truth = _simulated(0.0, 50e-6, stated=False)
    cell, codes = data["cell"], {f["code"] for f in data["flags"]}
    assert abs(cell["bridge_MOhm"]) <= cell["bridge_ci95_MOhm"]  # its CI includes zero
    assert cell["bridge_applied"] is False
    assert cell["r_in_MOhm"] == cell["r_in_raw_MOhm"]
    assert cell["r_in_MOhm"] == pytest.approx(truth["r_in_MOhm"], rel=0.01)
    assert "cell.filter_estimated" in codes
    assert cell.get("electrode_lag_us") is None   # no jump: no lag
    assert cell["filter_source"] == "estimated from the baseline noise spectrum"
    assert cell["filter_corner_hz"] == pytest.approx(5_000.0, rel=0.1)


@pytest.mark.parametrize("corner", [1_000.0, 2_000.0, 5_000.0])
def test_the_corner_is_read_from_the_noise_spectrum(corner):
    # white noise through the simulator's analog 4-pole Bessel (filtered at 8x the rate,
    # then sampled): the spectrum's roll-off gives the corner back
    from passivefit.core.lowpass import corner_from_noise

    cell = BallStick.from_electrotonic(0.022, 1.0, 5.0, 110e6)
    for filter_hz, expected in ((corner, corner), (None, None)):
        rec, _ = simulate_recording(cell, protocol=STEPS, n_sweeps=20, sweep_duration_s=0.8,
                                    filter_hz=filter_hz, noise_sd_V=0.3e-3, seed=2)
        found = corner_from_noise([s.voltage[:1_990] for s in rec.sweeps], 20_000.0)
        if expected is None:   # white noise: no roll-off, no corner
            assert found is None
        else:
            assert found == pytest.approx(expected, rel=0.06)


# ------------------------------------------------------------------------------ one τ1
def test_the_pdf_shows_the_cells_one_tau1(ca1, tmp_path):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from passivefit.export import report

    result = analyze(ca1, Settings(bootstrap=0))
    caption = result.cell.tau1_caption()
    assert caption is not None and f"{result.cell.values['tau1_ms']:.3g}" in caption
    fig, (ax_semilog, ax0, ax1) = plt.subplots(3)
    report._draw_semilog(ax_semilog, result, ca1.sample_rate_hz)
    report._draw_scan(ax0, ax1, result, result.to_dict())
    for ax in (ax_semilog, ax1):
        labels = ax.get_legend_handles_labels()[1]
        assert caption in labels
        other_tau1 = [lab for lab in labels if "τ1" in lab and lab != caption]
        assert not other_tau1, other_tau1   # no second τ1 value beside the cell's
    plt.close(fig)


def test_the_window_shows_the_cells_one_tau1(qtbot, open_window, recording_file, tmp_path):
    import shutil

    import pyqtgraph as pg

    window = open_window(shutil.copy(recording_file, tmp_path / recording_file.name))
    qtbot.waitUntil(lambda: window.idle, timeout=60_000)
    result = window.current_result()
    caption = result.cell.tau1_caption()
    assert caption is not None
    tau1 = result.cell.values["tau1_ms"]
    # the card: the value, and its source on hover
    card = window.cell.values["tau1_ms"]
    assert card.text().startswith(f"{tau1:.4g}")
    assert result.cell.values["tau1_source"] in card.toolTip()
    # the fit-start scan: the cell's line carries the caption
    lines = [i for i in window.scan.tau1.getPlotItem().items if isinstance(i, pg.InfiniteLine)]
    assert [line.label.toPlainText() for line in lines] == [caption]
    assert lines[0].value() == pytest.approx(tau1)
    # the semilog view: the peel's lines are start values, the cell's τ1 is named once
    names = [item.name() for item in window.semilog.plot.getPlotItem().listDataItems()
             if item.name()]
    assert caption in names
    assert all("start value" in n for n in names if n.startswith("peel"))


@pytest.mark.parametrize("se_hz, undetermined", [(200.0, False), (60_000.0, True), (None, False)])
def test_a_fitted_corner_the_data_do_not_determine_is_said(se_hz, undetermined):
    # a corner fitted to the step edge with a 95 % CI wider than itself (as 500 ± 116,000 Hz
    # on a real recording behind a 500 Hz filter) asks for the corner; one from the noise
    # spectrum (no CI) or a determined one does not
    from types import SimpleNamespace

    from passivefit.analysis.cable import Chain
    from passivefit.analysis.pipeline import _chain_flags

    fit = SimpleNamespace(corner_hz=500.0, corner_se_hz=se_hz)
    (flag,) = _chain_flags(fit, Chain(source="estimated from the step edge"))
    assert flag.code == "cell.filter_estimated"
    assert ("give the corner (`--filter-hz`" in flag.message) is undetermined
