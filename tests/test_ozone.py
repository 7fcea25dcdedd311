"""The daemon's ozone cross-section table (daemon/science/ozone.py) against published values.

Status letters as in docs/REFERENCES.md: C read in a published source, F computed from
a confirmed published formula, M from memory (loose tolerance).
"""

from __future__ import annotations

import pytest

from daemon.config.settings import Channel
from daemon.science import ozone
from sim_instrument import sky

# 10-nm bin means of Serdyuchenko et al. (2014), Atmos. Meas. Tech. 7:625, and
# Gorshelev et al. (2014), 233 K, as listed in docs/REFERENCES.md (C; values to
# 3 significant figures, tau at 300 DU to 2).
# (bin lower edge [nm], cross-section [cm^2], tau per DU, tau at 300 DU)
SERDYUCHENKO_BINS = [
    (440, 1.58e-22, 4.25e-6, 0.0013),
    (490, 9.02e-22, 2.42e-5, 0.0073),
    (500, 1.48e-21, 3.98e-5, 0.0119),
    (670, 1.47e-21, 3.96e-5, 0.0119),
    (600, 5.02e-21, 1.35e-4, 0.040),
]
# 1 DU = 2.687e16 molecules cm^-2 (docs/REFERENCES.md, definition of the Dobson unit).
DU_CM2 = 2.687e16
# Cross-sections are ~1e-21 cm^2: pytest.approx's default abs=1e-12 would accept any of
# them, so every comparison of one sets abs=0.


@pytest.mark.parametrize(("edge_nm", "sigma_cm2", "tau_per_du", "tau_300"), SERDYUCHENKO_BINS)
def test_table_bins_match_serdyuchenko_2014(edge_nm, sigma_cm2, tau_per_du, tau_300):
    # Serdyuchenko et al. 2014 10-nm bin means (docs/REFERENCES.md, C): the table holds
    # them as "C" bins, to the 3 significant figures published.
    value, status = ozone.CROSS_SECTION_CM2[edge_nm]
    assert status == "C"
    assert value == pytest.approx(sigma_cm2, rel=6e-3, abs=0.0)


@pytest.mark.parametrize(("edge_nm", "sigma_cm2", "tau_per_du", "tau_300"), SERDYUCHENKO_BINS)
def test_a_band_on_one_bin_gives_the_published_tau_per_du(edge_nm, sigma_cm2, tau_per_du,
                                                          tau_300):
    # A 10-nm band centred on a bin is exactly that bin; tau per DU and at 300 DU from
    # Serdyuchenko et al. 2014 with 1 DU = 2.687e16 cm^-2 (docs/REFERENCES.md, C).
    sigma = ozone.band_cross_section_cm2(edge_nm + 5.0, 10.0)
    assert sigma == pytest.approx(sigma_cm2, rel=6e-3, abs=0.0)
    assert ozone.ozone_optical_depth(sigma, 1.0) == pytest.approx(tau_per_du, rel=6e-3)
    assert ozone.ozone_optical_depth(sigma, 300.0) == pytest.approx(tau_300, rel=4e-2)


def test_tau_per_du_uses_the_dobson_unit_definition():
    # 1 DU = 2.687e16 molecules cm^-2 (docs/REFERENCES.md): tau = sigma * DU * 2.687e16.
    assert ozone.ozone_optical_depth(1.0e-21, 260.0) == pytest.approx(1.0e-21 * 260.0 * DU_CM2,
                                                                      rel=1e-12)


def test_500_nm_channel_is_about_0_032_per_atm_cm():
    # A 10-nm band at 500 nm is the mean of the 490-500 and 500-510 Serdyuchenko bins
    # (docs/REFERENCES.md, C); per atm-cm (1000 DU) about 0.032 (F; the common 0.0328
    # is from memory, hence the loose tolerance on that one).
    ch = Channel("500", 500.0, 10.0)
    sigma = ozone.channel_cross_section_cm2(ch)
    assert sigma == pytest.approx((9.02e-22 + 1.48e-21) / 2.0, rel=6e-3, abs=0.0)
    assert ozone.ozone_optical_depth(sigma, 1000.0) == pytest.approx(0.032, rel=3e-2)


def test_675_nm_channel_is_the_670_680_bin():
    # Serdyuchenko et al. 2014, 670-680 nm bin mean 1.47e-21 cm^2 (docs/REFERENCES.md, C).
    assert ozone.channel_cross_section_cm2(Channel("675", 675.0, 10.0)) == pytest.approx(
        1.47e-21, rel=6e-3, abs=0.0)


@pytest.mark.parametrize("wavelength_nm", [870.0, 1020.0])
def test_ozone_negligible_in_the_near_infrared_channels(wavelength_nm):
    # docs/REFERENCES.md: negligible at 870 and 1020 nm (from memory); "negligible" taken
    # as below 1e-3 at 300 DU (from memory, loose).
    sigma = ozone.channel_cross_section_cm2(Channel(str(wavelength_nm), wavelength_nm, 10.0))
    assert 0.0 < ozone.ozone_optical_depth(sigma, 300.0) < 1e-3


def test_configured_cross_section_wins_and_an_untabulated_band_gives_none():
    ch = Channel("500", 500.0, 10.0, ozone_cross_section_cm2=1.19e-21)
    assert ozone.channel_cross_section_cm2(ch) == 1.19e-21
    assert ozone.channel_cross_section_cm2(Channel("1060", 1060.0, 10.0)) is None
    with pytest.raises(ValueError, match="bandwidth_nm must be a positive number"):
        ozone.band_cross_section_cm2(500.0, 0.0)


def test_daemon_and_simulator_tables_agree_bin_for_bin():
    # The daemon keeps its own copy (it must not import the simulator); every bin it
    # holds must be the simulator's value with the same status letter.
    assert ozone.BIN_WIDTH_NM == sky.OZONE_BIN_WIDTH_NM
    assert ozone.MOLECULES_PER_DU_CM2 == sky.MOLECULES_PER_DU_CM2
    sim = sky.OZONE_BIN_CROSS_SECTION_CM2
    assert set(ozone.CROSS_SECTION_CM2) <= set(sim)
    for edge, entry in ozone.CROSS_SECTION_CM2.items():
        assert entry == sim[edge], f"{edge}-{edge + 10} nm bin"
    # Bins only the simulator holds are the from-memory ones of the 940 nm
    # water-vapour band (the daemon leaves ozone uncorrected there unless configured).
    assert {sim[e][1] for e in set(sim) - set(ozone.CROSS_SECTION_CM2)} <= {"M"}
