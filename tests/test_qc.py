"""Student's t quantile (core.qc.t975), computed without scipy on the analysis path."""

from __future__ import annotations

import pytest

from passivefit.core.qc import f_survival, t975


@pytest.mark.parametrize("dof", [*range(1, 60), 99, 100, 1000, 1001, 5000, 10**6])
def test_t975_is_scipys_student_quantile(dof):
    # against scipy.special.stdtrit (an outside reference), the exact series and Newton
    # (docs/references.md §12) up to 1000 dof, the Cornish-Fisher expansion beyond
    from scipy.special import stdtrit

    assert t975(dof) == pytest.approx(float(stdtrit(dof, 0.975)), rel=1e-11)


def test_t975_known_values():
    # printed t tables (from memory): 12.706 (1 dof), 2.228 (10 dof), 1.960 (normal limit)
    assert t975(1) == pytest.approx(12.706, abs=5e-4)
    assert t975(10) == pytest.approx(2.228, abs=5e-4)
    assert t975(10**7) == pytest.approx(1.960, abs=5e-4)
    assert t975(0) == t975(1)   # fewer than one degree of freedom is taken as one


@pytest.mark.parametrize("d1", [1, 2, 3, 5])
@pytest.mark.parametrize("d2", [1, 4, 60, 5000, 40_000])
def test_f_survival_is_scipys(d1, d2):
    # against scipy.special.fdtrc (an outside reference): the continued fraction of the
    # regularized incomplete beta (docs/references.md §12)
    from scipy.special import fdtrc

    for f in (0.05, 0.8, 1.0, 3.0, 9.0, 60.0):
        assert f_survival(d1, d2, f) == pytest.approx(float(fdtrc(d1, d2, f)), rel=1e-8)
    assert f_survival(d1, d2, 0.0) == 1.0
