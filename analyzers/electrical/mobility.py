"""Resistivity of doped silicon from its doping, with the Masetti mobility model.

G. Masetti, M. Severi, S. Solmi, "Modeling of carrier mobility against carrier
concentration in arsenic-, phosphorus-, and boron-doped silicon", IEEE Trans.
Electron Devices ED-30(7), 764-769 (1983); silicon at 300 K, the published
parameters for phosphorus (electrons) and boron (holes):

    mu_e = mu0 + (mumax - mu0) / (1 + (N/Cr)^alpha) - mu1 / (1 + (Cs/N)^beta)
    mu_h = mu0 exp(-Pc/N) + mumax / (1 + (N/Cr)^alpha) - mu1 / (1 + (Cs/N)^beta)

The resistivity of uniformly doped, fully ionized silicon is 1 / (q N mu) (the
minority carriers are negligible), and a layer of uniform doping and depth t has the
sheet resistance rho / t. Dopings are in cm^-3, mobilities in cm^2/(V s).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

ELEMENTARY_CHARGE = 1.602176634e-19  # C (SI 2019, exact)
UM_PER_CM = 1e4
MIN_DOPING, MAX_DOPING = 1e13, 1e21  # cm^-3, the range the published fits cover


@dataclass(frozen=True)
class MasettiParameters:
    """The fit parameters of the Masetti mobility model for one carrier type."""
    mu0: float
    mumax: float
    cr: float
    alpha: float
    mu1: float
    cs: float
    beta: float
    pc: float  # 0 for the electron form, which has no exp(-Pc/N) factor


ELECTRONS_PHOSPHORUS = MasettiParameters(mu0=68.5, mumax=1414.0, cr=9.20e16, alpha=0.711,
                                         mu1=56.1, cs=3.41e20, beta=1.98, pc=0.0)
HOLES_BORON = MasettiParameters(mu0=44.9, mumax=470.5, cr=2.23e17, alpha=0.719,
                                mu1=29.0, cs=6.1e20, beta=2.0, pc=9.23e16)
# The majority carriers of each doping type: an n-well is n-type, a p-well or the substrate p-type.
CARRIERS = {"n": ELECTRONS_PHOSPHORUS, "p": HOLES_BORON}


def mobility(doping: float, doping_type: str) -> float:
    """Majority-carrier mobility (cm^2/(V s)) in silicon doped ``doping`` cm^-3 of
    ``doping_type`` "n" (phosphorus) or "p" (boron), at 300 K."""
    p = _parameters(doping_type)
    _check_doping(doping)
    lattice = 1 + (doping / p.cr) ** p.alpha
    clustering = p.mu1 / (1 + (p.cs / doping) ** p.beta)
    if doping_type == "n":
        return p.mu0 + (p.mumax - p.mu0) / lattice - clustering
    return p.mu0 * math.exp(-p.pc / doping) + p.mumax / lattice - clustering


def resistivity(doping: float, doping_type: str) -> float:
    """Resistivity in ohm cm."""
    return 1.0 / (ELEMENTARY_CHARGE * doping * mobility(doping, doping_type))


def sheet_resistance(doping: float, depth_um: float, doping_type: str) -> float:
    """Sheet resistance (ohm per square) of a uniformly doped layer ``depth_um`` deep."""
    if not depth_um > 0:
        raise ValueError(f"depth: expected a positive number of um, got {depth_um!r}")
    return resistivity(doping, doping_type) / (depth_um / UM_PER_CM)


def _parameters(doping_type: str) -> MasettiParameters:
    try:
        return CARRIERS[doping_type]
    except KeyError:
        raise ValueError(f"doping type: expected 'n' or 'p', got {doping_type!r}") from None


def _check_doping(doping: float) -> None:
    if not MIN_DOPING <= doping <= MAX_DOPING:
        raise ValueError(f"doping: expected {MIN_DOPING:.0e} to {MAX_DOPING:.0e} cm^-3, got {doping!r}")
