"""Minority-carrier and temperature parameters of the trigger analysis, with their sources.

Diffusion lengths. ``[electrical] electron_diffusion_length`` (electrons in the p-body)
and ``hole_diffusion_length`` (holes in an n-well) in um win; else, with
``electron_lifetime`` / ``hole_lifetime`` (s), L = sqrt(D tau) with D = mu kT/q and the
minority mobility of the body's doping (``psub_doping``, ``nwell_doping``; without one,
the fit's low-doping limit, which gives the longest L); else the defaults below.

- Minority mobility: the fits of ngspice's CIDER device simulator
  (src/include/ngspice/numconst.h, "ref. SOLL90"): electrons in p-Si
  mu = 232 + 1180 / (1 + (N / 8.0e16)^0.9), holes in n-Si
  mu = 130 + 370 / (1 + (N / 8.0e17)^1.25), cm^2/(V s), 300 K.
- Default lengths: the same source's SRH lifetimes (tau0 3.0e-5 s for electrons,
  1.0e-5 s for holes, Nref 1e17) give L = 327 / 297 / 172 um for electrons at
  1e15 / 1e16 / 1e17 cm^-3 and 108 / 78 um for holes at 1e16 / 1e17; the lifetimes
  of Fossum and Lee (Solid-State Electronics 25, 1982, as given in the Allpix Squared
  manual) give 181 / 127 / 42 um for electrons. Those are ideal material; processed
  wafers are lower. The defaults, 100 um for electrons in a bulk p-substrate and 30 um
  for holes in an n-well, are a judgement inside those published ranges, not a
  published value: set both from your process. Epitaxial wafers (a p- layer over p+)
  confine electrons to the epi and need a far shorter effective length.

Sink length of a shallow diffusion (analyzers/electrical/transport.py): 2t / pi with t
the depth of the sheet the carriers flow in, taken as the n-well depth (``nwell_depth``,
else DEFAULT_SHEET_DEPTH = 2 um: a typical n-well junction depth of 1.5-3 um, from
memory, unverified).

Temperature. ``[electrical] temperature`` (C, default 25: JEDEC JESD78 class I runs at
room temperature, class II at the maximum operating temperature). vbe_on, the sheets
and the lengths of the technology are taken as given at REFERENCE_C.

- vbe_on falls VBE_PER_K = -2 mV/K at constant current (Sedra and Smith,
  Microelectronic Circuits, from memory: edition and page not confirmed). The
  textbook derivation from I_S ~ T^3 exp(-Eg / kT), dV/dT = (V - (Eg + 3kT) / q) / T,
  gives -1.66 mV/K at 0.7 V and -1.99 at 0.6 V (tests/analyzers/test_carriers.py).
- Sheet resistance: R(T) = R(25 C) (1 + TC1 dT + TC2 dT^2) with the GF180MCU n-well
  resistor's TC1 = 2.285e-3 /C and TC2 = 9.78e-6 /C^2 (globalfoundries-pdk-libs-
  gf180mcu_fd_pr, models/ngspice/sm141064.ngspice, subckt nwell, Tnom 25 C): x1.326
  at 125 C. The SKY130 n-well resistor (TC1 1.483e-3, TC2 7.824e-6) gives x1.212; the
  larger one is used for every body, which errs towards more bias.
- Minority mobility falls as T^-gamma (lattice scattering: gamma = 2.33 for electrons,
  2.23 for holes, Arora, Hauser and Roulston, IEEE TED 29, 1982), so D = mu kT/q goes
  as T^(1 - gamma) and, with the lifetime held, L as T^((1 - gamma) / 2): x0.82 for
  electrons at 125 C. The lifetime's own rise with temperature is not modelled; the
  lattice exponent overstates the fall in doped silicon.
"""

from __future__ import annotations

import math

BOLTZMANN_EV = 8.617333262e-5  # eV/K (SI 2019, exact)
ZERO_CELSIUS = 273.15
REFERENCE_C = 25.0
UM_PER_CM = 1e4

DEFAULT_ELECTRON_LENGTH = 100.0  # um, a judgement inside the published range (module docstring)
DEFAULT_HOLE_LENGTH = 30.0  # um
DEFAULT_SHEET_DEPTH = 2.0  # um, from memory (module docstring)
VBE_PER_K = -2.0e-3  # V/K, Sedra and Smith (from memory)
SHEET_TC1, SHEET_TC2 = 2.285e-3, 9.78e-6  # /C, /C^2: GF180MCU n-well resistor
MOBILITY_EXPONENT = {"electrons": 2.33, "holes": 2.23}  # Arora et al. 1982, lattice term
# CIDER minority-mobility fits: (mu_min, mu_range, N_ref, exponent)
MINORITY_MOBILITY = {"electrons": (232.0, 1180.0, 8.0e16, 0.9), "holes": (130.0, 370.0, 8.0e17, 1.25)}


def minority_mobility(carriers: str, doping: float | None) -> float:
    """cm^2/(V s) at 300 K; ``doping`` None takes the low-doping limit."""
    mu_min, mu_range, n_ref, exponent = MINORITY_MOBILITY[carriers]
    if doping is None:
        return mu_min + mu_range
    return mu_min + mu_range / (1 + (doping / n_ref) ** exponent)


def diffusion_length(elec, carriers: str) -> float:
    """um, at the technology's temperature: the key, else from the lifetime, else the default."""
    given = elec.electron_diffusion_length if carriers == "electrons" else elec.hole_diffusion_length
    lifetime = elec.electron_lifetime if carriers == "electrons" else elec.hole_lifetime
    if given is not None:
        length = given
    elif lifetime is not None:
        doping = elec.psub_doping if carriers == "electrons" else elec.nwell_doping
        thermal = BOLTZMANN_EV * (REFERENCE_C + ZERO_CELSIUS)  # kT/q in V
        length = math.sqrt(minority_mobility(carriers, doping) * thermal * lifetime) * UM_PER_CM
    else:
        length = DEFAULT_ELECTRON_LENGTH if carriers == "electrons" else DEFAULT_HOLE_LENGTH
    ratio = (elec.temperature + ZERO_CELSIUS) / (REFERENCE_C + ZERO_CELSIUS)
    return length * ratio ** ((1 - MOBILITY_EXPONENT[carriers]) / 2)


def sink_length(elec) -> float:
    """um: the sink length of a shallow diffusion, 2t / pi for the sheet depth t."""
    depth = elec.nwell_depth if elec.nwell_depth is not None else DEFAULT_SHEET_DEPTH
    return 2 * depth / math.pi


def vbe_on_at(elec) -> float:
    """V: the technology's vbe_on moved to its temperature."""
    return elec.vbe_on + VBE_PER_K * (elec.temperature - REFERENCE_C)


def sheet_factor(elec) -> float:
    """Sheet resistance at the technology's temperature over the one at REFERENCE_C."""
    dt = elec.temperature - REFERENCE_C
    return 1 + SHEET_TC1 * dt + SHEET_TC2 * dt * dt
