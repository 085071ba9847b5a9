"""The CODATA literals of laueline.constants against scipy.constants."""

import pytest
from scipy import constants as codata

from laueline import constants


@pytest.mark.parametrize("ours, key", [
    (constants.PLANCK_J_S, "Planck constant"),
    (constants.ELEMENTARY_CHARGE_C, "elementary charge"),
    (constants.SPEED_OF_LIGHT_M_S, "speed of light in vacuum"),
    (constants.ELECTRON_MASS_KG, "electron mass"),
])
def test_literals_match_codata(ours, key):
    # CODATA recommended values as shipped by scipy.constants.physical_constants.
    value, unit, uncertainty = codata.physical_constants[key]
    # h, e and c are exact since the 2019 SI: equal to the last digit. The
    # electron mass moved by 1.4e-9 relative between CODATA 2018 (scipy < 1.15)
    # and CODATA 2022; 5e-9 accepts either edition and nothing coarser.
    tolerance = 0.0 if uncertainty == 0 else 5e-9 * value
    assert ours == pytest.approx(value, rel=0, abs=tolerance)


def test_electron_rest_energy_from_literals():
    # m_e c^2 / e in eV against CODATA's "electron mass energy equivalent in MeV".
    rest_ev = constants.ELECTRON_MASS_KG * constants.SPEED_OF_LIGHT_M_S ** 2 \
        / constants.ELEMENTARY_CHARGE_C
    expected = codata.physical_constants["electron mass energy equivalent in MeV"][0] * 1e6
    # Same 5e-9 edition allowance as above (the rest energy inherits m_e's change).
    assert rest_ev == pytest.approx(expected, rel=5e-9)


def test_predict_command_imports_only_what_it_needs(tmp_path):
    # The reason for the literals: a fresh interpreter running the predict
    # command (parser, crystal, forward model, JSON) imports neither
    # scipy.constants nor the fit, survey or plotting code (run in a
    # subprocess for a clean module table).
    import subprocess
    import sys

    code = ("import io, sys, contextlib; from laueline.cli import main; "
            "out = io.StringIO(); "
            "with_ = contextlib.redirect_stdout(out); with_.__enter__(); "
            f"status = main(['predict', 'Si', '--zone', '1', '1', '0', '--json', "
            f"{str(tmp_path / 'p.json')!r}]); with_.__exit__(None, None, None); "
            "print(status, *sorted(m for m in ('scipy', 'scipy.constants', 'matplotlib', "
            "'laueline.refine', 'laueline.survey', 'skimage', 'pandas') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["0"]
