"""The Kasten-Young air mass written out in daemon.science.atmosphere (so a session fit
imports no pvlib) against pvlib's own kastenyoung1989 model, the reference library;
the published formula is Kasten and Young (1989), Appl. Opt. 28, 4735."""

from __future__ import annotations

import numpy as np
import pvlib
import pytest

from daemon.science import atmosphere


def test_the_air_mass_is_pvlibs_kasten_young():
    z = np.linspace(0.0, 90.0, 1801)
    ours = atmosphere.kasten_young_airmass(z)
    ref = pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989")
    assert np.allclose(ours, ref, rtol=1e-12, atol=0)
    # Kasten and Young (1989), table: about 38 at the horizon (from memory).
    assert pytest.approx(ref[-1], rel=1e-12) == atmosphere.KY_HORIZON_AIRMASS
    assert 37 < atmosphere.KY_HORIZON_AIRMASS < 39


def test_the_inverse_gives_back_the_zenith():
    z = np.array([0.5, 30.0, 60.0, 75.0, 85.0, 89.9])
    m = pvlib.atmosphere.get_relative_airmass(z, model="kastenyoung1989")
    assert np.allclose(atmosphere.zenith_from_kasten_young(m), z, atol=1e-9)
    assert np.isnan(atmosphere.zenith_from_kasten_young([0.5, 40.0])).all()
