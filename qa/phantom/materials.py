"""Linear attenuation coefficients of phantom materials, from published tables.

Elemental mass attenuation coefficients come from the xraydb package (Elam, Ravel &
Sieber, Radiation Physics and Chemistry 63, 2002). Mixtures follow the mixture rule
mu/rho = sum_i w_i (mu/rho)_i over mass fractions w_i. Tissue compositions are those of
ICRU Report 44 (1989) as tabulated by NIST (Hubbell & Seltzer, NISTIR 5632, Table 2).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache
from types import MappingProxyType

from ..errors import InputError


@dataclass(frozen=True)
class Composition:
    """A material given by mass fractions of elements and a density."""

    name: str
    fractions: MappingProxyType  # element symbol -> mass fraction
    density_g_cm3: float
    source: str


def _composition(name, density, source, **fractions):
    total = sum(fractions.values())
    if abs(total - 1.0) > 0.002:
        raise ValueError(f"{name}: mass fractions sum to {total}")
    return Composition(name, MappingProxyType(fractions), density, source)


_NIST = "ICRU Report 44 (1989), tabulated in NISTIR 5632 Table 2 (Hubbell & Seltzer)"

#: Mixtures known by name (beyond xraydb's own material list).
COMPOSITIONS = {
    c.name: c for c in (
        _composition("adipose-icru44", 0.95, _NIST,
                     H=0.114, C=0.598, N=0.007, O=0.278, Na=0.001, S=0.001, Cl=0.001),
        _composition("breast-icru44", 1.02, _NIST,
                     H=0.106, C=0.332, N=0.030, O=0.527, Na=0.001, P=0.001, S=0.002, Cl=0.001),
    )
}

#: Materials taken straight from xraydb's material list (formula and density there).
XRAYDB_NAMES = {"aluminium": "aluminum", "aluminum": "aluminum", "pmma": "pmma",
                "water": "water", "copper": "copper", "tungsten": "tungsten",
                "polycarbonate": "polycarbonate", "air": "air", "silver": "silver",
                "titanium": "titanium", "iron": "iron", "lead": "lead"}


def known_materials() -> tuple[str, ...]:
    return tuple(sorted(set(COMPOSITIONS) | set(XRAYDB_NAMES)))


@lru_cache(maxsize=256)
def linear_attenuation(material: str, energy_keV: float) -> float:
    """Linear attenuation coefficient in 1/mm of ``material`` at ``energy_keV``.

    Parameters
    ----------
    material : str
        A name from :func:`known_materials`, or ``"mix:A:w,B:w"`` for a mass-fraction
        blend of two or more known mixtures (for instance a 50/50 breast-like slab).
    energy_keV : float
        Effective (monoenergetic) energy in keV.

    Examples
    --------
    >>> round(linear_attenuation("water", 20.0), 4)   # xraydb: 0.810 1/cm at 20 keV
    0.081
    """
    import xraydb

    energy_eV = 1000.0 * float(energy_keV)
    if material.startswith("mix:"):
        parts = []
        for item in material[4:].split(","):
            name, _, weight = item.partition(":")
            try:
                parts.append((COMPOSITIONS[name.strip()], float(weight)))
            except (KeyError, ValueError):
                raise InputError(f"material '{material}': each part must be NAME:WEIGHT with "
                                 f"NAME one of {', '.join(COMPOSITIONS)}") from None
        total = sum(w for _, w in parts)
        if total <= 0:
            raise InputError(f"material '{material}': weights must add up to more than 0")
        # Mass-fraction blend: mu/rho mixes linearly by mass, volumes add (1/rho mixes).
        mass_att = sum(w / total * _mass_attenuation(c, energy_eV) for c, w in parts)
        inv_density = sum(w / total / c.density_g_cm3 for c, w in parts)
        return mass_att / inv_density / 10.0
    if material in COMPOSITIONS:
        comp = COMPOSITIONS[material]
        return _mass_attenuation(comp, energy_eV) * comp.density_g_cm3 / 10.0
    if material in XRAYDB_NAMES:
        return float(xraydb.material_mu(XRAYDB_NAMES[material], energy_eV)) / 10.0
    raise InputError(f"unknown material '{material}'; known: {', '.join(known_materials())}, "
                     "or mix:NAME:WEIGHT,... of the tissue mixtures")


def _mass_attenuation(comp: Composition, energy_eV: float) -> float:
    import xraydb

    return sum(w * float(xraydb.mu_elam(el, energy_eV)) for el, w in comp.fractions.items())
