"""Constituent catalogue: speeds derived from the astronomical rates.

Reference speeds: Schureman (1958), Special Publication 98, Table 2 (values quoted
from memory).  Schureman's rates are Newcomb's for 1900; ours are the J2000 rates of
Meeus (1998).  The differences reach a few 1e-7 deg/h for the eighth-diurnal M8
(8 x the 0.5e-7 difference in the lunar rate), so the tolerance is 1e-6 deg/h.
"""
import pytest

from predictor.constituents import CATALOGUE, get

deg_per_hour = 1.0

SCHUREMAN_TABLE_2 = {  # deg/h, from memory
    "M2": 28.9841042, "S2": 30.0, "N2": 28.4397295, "K2": 30.0821373, "K1": 15.0410686,
    "O1": 13.9430356, "P1": 14.9589314, "Q1": 13.3986609, "M4": 57.9682084,
    "MS4": 58.9841042, "Mf": 1.0980331, "Mm": 0.5443747, "Ssa": 0.0821373,
    "Sa": 0.0410686, "2N2": 27.8953548, "MU2": 27.9682084, "NU2": 28.5125831,
    "L2": 29.5284789, "T2": 29.9589333, "J1": 15.5854433, "OO1": 16.1391017,
    "M3": 43.4761563, "M6": 86.9523127, "M8": 115.9364166, "MK3": 44.0251729,
    "2MK3": 42.9271398, "MN4": 57.4238337,
    # further Table 2 entries, also from memory
    "M1": 14.4966939, "LDA2": 29.4556253, "R2": 30.0410667, "RHO1": 13.4715145,
    "2Q1": 12.8542862, "MSf": 1.0158958, "S1": 15.0, "S4": 60.0, "2SM2": 31.0158958,
}


@pytest.mark.parametrize("name,speed", sorted(SCHUREMAN_TABLE_2.items()))
def test_speed_matches_schureman_table_2(name, speed):
    assert get(name).speed == pytest.approx(speed, abs=1e-6 * deg_per_hour)


def test_catalogue_has_every_species_up_to_eighth_diurnal():
    assert len(CATALOGUE) >= 60
    assert {c.species for c in CATALOGUE.values()} == set(range(9))


def test_compound_doodson_numbers_are_sums_of_parents():
    # MS4 = M2 + S2; 2MK3 = 2 M2 - K1 (Foreman 1977 shallow-water rules).
    ms4 = get("MS4").doodson
    assert ms4[:6] == tuple(a + b for a, b in zip(get("M2").doodson, get("S2").doodson))[:6]
    assert get("2MK3").speed == pytest.approx(2 * get("M2").speed - get("K1").speed, abs=1e-12)


def test_lookup_ignores_case():
    assert get("mf").name == "Mf"
    assert get("m2") is CATALOGUE["M2"]


def test_unknown_name_suggests_close_matches():
    with pytest.raises(KeyError, match="M2"):
        get("M22")


def test_foreman_phase_conventions():
    # Foreman (1977): V(M2) = 2 tau, V(K1) = tau + s + 90 deg, V(O1) = tau - s - 90 deg.
    assert get("M2").doodson == (2, 0, 0, 0, 0, 0, 0)
    assert get("K1").doodson == (1, 1, 0, 0, 0, 0, 1)
    assert get("O1").doodson == (1, -1, 0, 0, 0, 0, -1)
