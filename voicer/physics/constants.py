"""Material constants for piano wire, each with its source.

Values are for room temperature. Where a value is recalled rather than read from the
handbook during development it says so ("from memory"); all are standard textbook values
that a technician's string calculator would also use.
"""

from __future__ import annotations

__all__ = [
    "STEEL_YOUNGS_MODULUS_PA",
    "STEEL_DENSITY_KG_M3",
    "STEEL_TENSILE_STRENGTH_PA",
    "COPPER_DENSITY_KG_M3",
    "WINDING_PACKING",
    "T60_LN",
]

import math

#: Young's modulus of high-carbon music wire (ASTM A228), about 207 GPa.
#: Source: ASM Metals Handbook, Vol. 1, carbon spring steels (from memory); piano
#: string design texts use 2.0-2.1e11 Pa (Fletcher 1964, JASA 36, 203).
STEEL_YOUNGS_MODULUS_PA = 2.07e11

#: Density of carbon steel, 7.85 g/cm^3. Source: CRC Handbook of Chemistry and Physics,
#: properties of iron/steel (from memory; the common engineering value).
STEEL_DENSITY_KG_M3 = 7850.0

#: Lower bound of the tensile strength of music wire around 1 mm diameter, about
#: 2.2 GPa (ASTM A228 minimum tensile strength table, from memory). Used only to reject
#: a scale that would break its strings, so the lower bound is the safe side.
STEEL_TENSILE_STRENGTH_PA = 2.2e9

#: Density of copper, 8.96 g/cm^3. Source: CRC Handbook of Chemistry and Physics,
#: "Physical constants of the elements" (from memory; the standard value).
COPPER_DENSITY_KG_M3 = 8960.0

#: Mass of a close-wound single layer of round wire relative to a solid copper tube of
#: the same inner and outer diameter: each turn of wire diameter w around a core of
#: diameter d has length pi (d + w) per w of string, which gives exactly pi/4 of the
#: tube's mass (geometry; no source needed).
WINDING_PACKING = math.pi / 4.0

#: ln(1000): a mode with amplitude decay rate sigma [1/s] falls 60 dB in ln(1000)/sigma s.
T60_LN = math.log(1000.0)
