"""The pieces of the trigger analysis (analyzers/electrical/trigger.py, carriers.py, and
the sheet's distributed sources) against derivations and published values."""

import math

import numpy as np
import pytest
import shapely

from latchwatch.analyzers.electrical import carriers
from latchwatch.analyzers.electrical.sheet import SheetProblem, source_potentials
from latchwatch.analyzers.electrical.trigger import lateral_beta, regeneration_threshold
from latchwatch.analyzers.technology.model import Electrical, TechnologyError, technology_from_mapping

NONE = np.empty(0, dtype=object)
LAYERS = {"nwell": [1, 0], "active": [2, 0], "poly": [3, 0], "nplus": [4, 0], "pplus": [5, 0], "contact": [6, 0]}


def shapes(*geoms):
    out = np.empty(len(geoms), dtype=object)
    out[:] = list(geoms)
    return out


def balance_regenerates(beta_n, beta_p, i_rw, i_rs, i_dd):
    """Re-derived from current balance on the two-transistor model with shunts: the supply
    current leaves through the NPN emitter and the substrate shunt, I_DD = I_En + I_RS with
    I_En = (beta_n + 1) I_Bn. The substrate node: the PNP collector current beta_p I_Bp feeds
    the NPN base and the shunt, beta_p I_Bp = I_Bn + I_RS. The loop holds itself when the
    NPN's collector current beta_n I_Bn exceeds what the n-well node needs, I_Bp + I_RW.
    Eliminating I_Bn and I_Bp gives beta_n beta_p > 1 + (beta_n + 1)(I_RS + beta_p I_RW) /
    (I_DD - I_RS), the condition of docs/physics.md."""
    i_bn = (i_dd - i_rs) / (beta_n + 1)
    if i_bn <= 0:
        return False
    i_bp = (i_bn + i_rs) / beta_p
    return beta_n * i_bn > i_bp + i_rw


@pytest.mark.parametrize("beta_n, beta_p, r_w, r_s, i_dd", [
    (10.0, 5.0, 500.0, 200.0, 0.1), (2.0, 1.5, 100.0, 50.0, 0.02), (50.0, 0.8, 2000.0, 1000.0, 0.1),
    (3.0, 3.0, 20.0, 10.0, 0.1), (1.0, 0.9, 1e4, 1e4, 0.01), (20.0, 20.0, 7.0, 7.0, 0.1)])
def test_regeneration_threshold_is_the_current_balance(beta_n, beta_p, r_w, r_s, i_dd):
    vbe = 0.7
    threshold = regeneration_threshold(beta_n, beta_p, vbe, r_w, r_s, i_dd)
    assert (beta_n * beta_p > threshold) == balance_regenerates(beta_n, beta_p, vbe / r_w, vbe / r_s, i_dd)


def test_regeneration_threshold_values():
    # By hand from the formula: beta_n 10, I_RS = 0.7 / 200 = 3.5 mA, I_RW = 0.7 / 500 = 1.4 mA,
    # beta_p 5, I_DD 100 mA: 1 + 11 (3.5 + 5 * 1.4) / (100 - 3.5) = 1 + 115.5 / 96.5 = 2.19689.
    assert regeneration_threshold(10.0, 5.0, 0.7, 500.0, 200.0, 0.1) == pytest.approx(2.196891, rel=1e-6)
    # Without shunts the classic condition: beta_n beta_p > 1.
    assert regeneration_threshold(10.0, 5.0, 0.7, None, None, 0.1) == 1.0
    # A substrate shunt that takes the whole supply current: never.
    assert regeneration_threshold(10.0, 5.0, 0.7, 500.0, 5.0, 0.1) == math.inf


def test_lateral_beta_is_the_base_transport_factor():
    # Neamen eq. 12.39a: alpha_T = sech(W / L); beta = alpha / (1 - alpha) = 1 / (cosh(W / L) - 1),
    # about 2 L^2 / W^2 for W << L.
    assert lateral_beta(10.0, 30.0) == pytest.approx(1 / (math.cosh(1 / 3) - 1), rel=1e-9)
    assert lateral_beta(0.1, 100.0) == pytest.approx(2 * 100.0 ** 2 / 0.1 ** 2, rel=1e-5)
    assert lateral_beta(1e5, 1.0) == 0.0


def test_vbe_coefficient_agrees_with_the_textbook_derivation():
    """I_S ~ T^3 exp(-Eg / kT) at constant I gives dV/dT = (V - (Eg + 3kT) / q) / T: with
    Eg = 1.12 eV at 300 K, -1.66 mV/K at 0.7 V and -1.99 mV/K at 0.6 V (computed here; the
    -2 mV/K rule of thumb is Sedra and Smith's, from memory)."""
    kt = carriers.BOLTZMANN_EV * 300.0
    derived = [(v - (1.12 + 3 * kt)) / 300.0 for v in (0.6, 0.7)]
    assert derived == pytest.approx([-1.99e-3, -1.66e-3], abs=0.01e-3)
    assert derived[1] <= carriers.VBE_PER_K * 0.8 and carriers.VBE_PER_K <= derived[0] * 0.99
    hot = Electrical(vbe_on=0.7, temperature=125.0)
    assert carriers.vbe_on_at(hot) == pytest.approx(0.5)


def test_sheet_factor_at_125_c_is_the_gf180mcu_nwell_resistor():
    # GF180MCU nwell resistor, TC1 2.285e-3, TC2 9.78e-6 (sm141064.ngspice): R(125 C) / R(25 C) = 1.326.
    assert carriers.sheet_factor(Electrical(temperature=125.0)) == pytest.approx(1.326, abs=5e-4)
    assert carriers.sheet_factor(Electrical()) == 1.0


def test_diffusion_length_from_lifetime_and_doping():
    # ngspice CIDER (numconst.h): electrons in p-Si at 1e15 cm^-3, mu = 232 + 1180 / (1 + (1e15/8e16)^0.9),
    # tau = 3.0e-5 / (1 + 1e15 / 1e17): L = 327 um at 300 K (REFERENCE values, computed); we take kT/q at
    # 25 C, 0.6 % lower in L.
    elec = Electrical(psub_doping=1e15, psub_depth=100.0, electron_lifetime=3.0e-5 / 1.01)
    assert carriers.diffusion_length(elec, "electrons") == pytest.approx(327.0, rel=0.01)
    assert carriers.diffusion_length(Electrical(), "electrons") == carriers.DEFAULT_ELECTRON_LENGTH
    assert carriers.diffusion_length(Electrical(hole_diffusion_length=12.0), "holes") == 12.0
    # Warmer: L ~ T^((1 - 2.33) / 2) with the lifetime held (Arora's lattice exponent).
    hot = carriers.diffusion_length(Electrical(temperature=125.0), "electrons")
    assert hot == pytest.approx(100.0 * (398.15 / 298.15) ** -0.665, rel=1e-9)


def test_temperature_key_validation():
    def tech(electrical):
        return technology_from_mapping({"name": "t", "layers": LAYERS, "electrical": electrical}, "t.toml")

    assert tech({"temperature": -40}).electrical.temperature == -40.0
    assert tech({"electron_diffusion_length": 50.0}).electrical.electron_diffusion_length == 50.0
    with pytest.raises(TechnologyError, match=r"t.toml: electrical.temperature: expected a temperature"):
        tech({"temperature": "hot"})
    with pytest.raises(TechnologyError, match=r"electrical.hole_diffusion_length: expected a positive number"):
        tech({"hole_diffusion_length": 0})


def test_distributed_source_in_a_strip():
    # Analytic sheet resistance of a strip (R = Rs L / W): a current I entering at the far end of
    # a strip grounded at the other end raises it to I Rs L / W; an emitter there sees that bias.
    rs, length, width, current = 1000.0, 20.0, 2.0, 1e-3
    problem = SheetProblem((0, 0, length + 1, width), shapes(shapely.box(0, 0, length + 1, width)), NONE,
                           shapes(shapely.box(0, 0, 1, width)), shapes(shapely.box(length, 0, length + 1, width)), rs)
    result = source_potentials(problem, np.array([[length + 0.5, 1.0]]), np.array([current]))
    assert result.peak[0] == pytest.approx(current * rs * length / width, rel=0.03)
    assert result.at[0][0] > length
