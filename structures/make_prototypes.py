"""Write the prototype crystal structures of ``structures/`` as symmetrized CIF files.

Run from the repository root::

    python structures/make_prototypes.py

Every ``*.cif`` named in :data:`PROTOTYPES` is rewritten beside this script.
The output is deterministic (no dates, no random numbers), so re-running the
script on an unchanged table leaves the files byte-for-byte identical.
:func:`check` then reads every file back with ``ase.io.read``, which expands
the asymmetric unit with the listed symmetry operations, and verifies the atom
count, the composition, the space group (via spglib) and the shortest
cation-anion distances. The script exits non-zero if any check fails.

This script depends on numpy, ase and spglib only: it does not use any
``madelung`` code, so it can serve as an independent source of test inputs.

Writing the CIF
---------------
The writer is our own (not ``ase.io.write``). Each file holds one ``data_``
block with the cell, the space group (Hermann-Mauguin symbol, IT number, Hall
symbol), the full list of symmetry operations of the chosen setting (from
``spglib.get_symmetry_from_database(hall_number)``, centring translations
included), the atom types with their formal oxidation numbers and the
asymmetric unit (one line per Wyckoff site, occupancy 1).

Formal oxidation numbers
------------------------
The ``_atom_type_oxidation_number`` values are formal (ionic-limit) charges.
A point-charge model with formal charges is a model estimate: it overstates
the electrostatic energy of crystals with appreciable covalency (ZnS, ZnO,
TiO2, ScN, the transition-metal oxides), so numbers derived from these files
are not measured lattice energies.

Magnetite (Fe3O4) is the one file whose charges are deliberately left
incomplete. Above the Verwey transition the tetrahedral 8a site holds Fe3+
and the octahedral 16d site holds, on average, Fe2.5+ (one Fe2+ and one Fe3+
per two 16d sites, electron-hopping). An average charge of 2.5 is not a
proper oxidation number, so the 16d site gets the plain type symbol ``Fe``
and **no** row in the ``_atom_type`` loop; a charge-assignment code must
decide how to treat it (e.g. by charge neutrality: 2 x q(16d) + 3 - 8 = 0).

Sources of the numbers
----------------------
Each entry in :data:`PROTOTYPES` names its source beside the numbers. Almost
all of them were written down from memory of the cited references (R. W. G.
Wyckoff, *Crystal Structures*, Vol. 1, 2nd ed., Interscience, 1963, and the
single-crystal papers named per entry); they are marked "from memory" and
should be re-checked against the printed source before being used as
high-precision reference data. Site positions on special Wyckoff positions
(0, 1/4, 1/2, ...) are facts of the trade for each structure type.
"""

from __future__ import annotations

import sys
import warnings
from collections import Counter
from dataclasses import dataclass, field
from fractions import Fraction
from math import gcd, sqrt
from pathlib import Path

import numpy as np
import spglib

HERE = Path(__file__).resolve().parent

# Elements treated as anions in the distance checks.
ANION_ELEMENTS = frozenset({"N", "O", "F", "S", "Cl", "Br", "I"})


@dataclass(frozen=True)
class Site:
    """One Wyckoff site of the asymmetric unit."""

    label: str  # e.g. "Na1"
    type_symbol: str  # e.g. "Na1+" (or plain "Fe" when no oxidation number is given)
    wyckoff: str  # e.g. "4a" (written as a comment only)
    xyz: tuple[float, float, float]  # fractional coordinates


@dataclass(frozen=True)
class Prototype:
    """A crystal structure to be written as one CIF file."""

    filename: str
    title: str
    hall_number: int  # spglib's Hall number: fixes the setting / origin choice
    sg_number: int  # expected International Tables number
    setting_note: str  # "origin choice 2", "hexagonal axes", ...
    cell: tuple[float, float, float, float, float, float]  # a, b, c (Angstrom), alpha, beta, gamma (deg)
    sites: tuple[Site, ...]
    oxidation: dict[str, int]  # _atom_type rows: type symbol -> formal oxidation number
    formula_unit: dict[str, int]  # composition of one formula unit
    z: int  # formula units in the conventional cell
    source: str  # where the cell / positional parameters come from
    # Expected shortest distance (Angstrom) from each cation site (by label) to an anion,
    # with the tolerance and the reason for the number.
    expected_nn: dict[str, tuple[float, float, str]] = field(default_factory=dict)


def _cubic(a: float) -> tuple[float, float, float, float, float, float]:
    return (a, a, a, 90.0, 90.0, 90.0)


def _tetragonal(a: float, c: float) -> tuple[float, float, float, float, float, float]:
    return (a, a, c, 90.0, 90.0, 90.0)


def _hexagonal(a: float, c: float) -> tuple[float, float, float, float, float, float]:
    return (a, a, c, 90.0, 90.0, 120.0)


# Hall numbers in spglib's table (spglib.get_spacegroup_type(h) confirms each):
HALL_FM3M = 523  # 225 F m -3 m
HALL_PM3M = 517  # 221 P m -3 m
HALL_F43M = 512  # 216 F -4 3 m
HALL_P63MC = 480  # 186 P 6_3 m c
HALL_P42MNM = 419  # 136 P 4_2/m n m
HALL_R3C_H = 460  # 167 R -3 c, hexagonal axes
HALL_FD3M_2 = 526  # 227 F d -3 m, origin choice 2 (origin at -3m)
HALL_R3_H = 436  # 148 R -3, hexagonal axes
HALL_R3M_H = 458  # 166 R -3 m, hexagonal axes
HALL_I4MMM = 424  # 139 I 4/m m m

EXACT = 1e-4  # tolerance for distances fixed by geometry alone


def _rocksalt(cation: str, anion: str, qc: int, a: float, source: str,
              name: str | None = None) -> Prototype:
    """Rock-salt AX: A on 4a (0,0,0), X on 4b (1/2,1/2,1/2) of Fm-3m (fact of the trade)."""
    ct = f"{cation}{qc}+"
    at = f"{anion}{qc}-"
    return Prototype(
        filename=f"rocksalt-{name or cation + anion}.cif",
        title=f"{cation}{anion}, rock-salt structure",
        hall_number=HALL_FM3M,
        sg_number=225,
        setting_note="",
        cell=_cubic(a),
        sites=(
            Site(f"{cation}1", ct, "4a", (0.0, 0.0, 0.0)),
            Site(f"{anion}1", at, "4b", (0.5, 0.5, 0.5)),
        ),
        oxidation={ct: qc, at: -qc},
        formula_unit={cation: 1, anion: 1},
        z=4,
        source=source,
        # nearest neighbour at a/2 (geometry, fact of the trade)
        expected_nn={f"{cation}1": (a / 2, EXACT, "a/2, geometry")},
    )


WYCKOFF_1963 = 'R. W. G. Wyckoff, "Crystal Structures", Vol. 1, 2nd ed. (Interscience, 1963)'

PROTOTYPES: tuple[Prototype, ...] = (
    # ---------------------------------------------------------------- rock salt
    _rocksalt("Na", "Cl", 1, 5.6402,  # Wyckoff (1963), room temperature; from memory
              f"a = 5.6402 A: {WYCKOFF_1963}, room temperature (from memory)"),
    _rocksalt("Mg", "O", 2, 4.2112,  # Wyckoff (1963); from memory. The brief had 4.212 (same to 0.02 %)
              f"a = 4.2112 A: {WYCKOFF_1963} (from memory; 4.211-4.213 A is the usual room-temperature range)"),
    _rocksalt("Ca", "O", 2, 4.8105,  # Wyckoff (1963); from memory
              f"a = 4.8105 A: {WYCKOFF_1963} (from memory)"),
    # rock-salt alkali halides and ScN for lattice-energy work
    _rocksalt("Li", "F", 1, 4.0270,  # Wyckoff (1963); from memory
              f"a = 4.0270 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("Na", "F", 1, 4.634,  # Wyckoff (1963); from memory
              f"a = 4.634 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("Na", "Br", 1, 5.9772,  # Wyckoff (1963); from memory
              f"a = 5.9772 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("Na", "I", 1, 6.4728,  # Wyckoff (1963); from memory
              f"a = 6.4728 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("K", "F", 1, 5.347,  # Wyckoff (1963); from memory
              f"a = 5.347 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("K", "Cl", 1, 6.2931,  # Wyckoff (1963); from memory
              f"a = 6.2931 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("K", "Br", 1, 6.5966,  # Wyckoff (1963); from memory
              f"a = 6.5966 A: {WYCKOFF_1963} (from memory)"),
    _rocksalt("Sc", "N", 3, 4.50,  # from memory: thin-film / powder values 4.50-4.52 A are reported
              "a = 4.50 A (from memory; reported room-temperature values for ScN lie in 4.50-4.52 A)"),
    # ------------------------------------------------------------ caesium chloride
    Prototype(
        filename="caesium-chloride-CsCl.cif",
        title="CsCl, caesium-chloride structure",
        hall_number=HALL_PM3M, sg_number=221, setting_note="",
        cell=_cubic(4.123),  # Wyckoff (1963), room temperature; from memory
        sites=(Site("Cs1", "Cs1+", "1a", (0.0, 0.0, 0.0)),
               Site("Cl1", "Cl1-", "1b", (0.5, 0.5, 0.5))),
        oxidation={"Cs1+": 1, "Cl1-": -1},
        formula_unit={"Cs": 1, "Cl": 1}, z=1,
        source=f"a = 4.123 A: {WYCKOFF_1963} (from memory)",
        expected_nn={"Cs1": (4.123 * sqrt(3) / 2, EXACT, "a*sqrt(3)/2, geometry")},
    ),
    # ------------------------------------------------------------------ zinc blende
    Prototype(
        filename="zincblende-ZnS.cif",
        title="ZnS (sphalerite), zinc-blende structure",
        hall_number=HALL_F43M, sg_number=216, setting_note="",
        cell=_cubic(5.4093),  # Wyckoff (1963); from memory
        sites=(Site("Zn1", "Zn2+", "4a", (0.0, 0.0, 0.0)),
               Site("S1", "S2-", "4c", (0.25, 0.25, 0.25))),
        oxidation={"Zn2+": 2, "S2-": -2},
        formula_unit={"Zn": 1, "S": 1}, z=4,
        source=f"a = 5.4093 A: {WYCKOFF_1963} (from memory)",
        expected_nn={"Zn1": (5.4093 * sqrt(3) / 4, EXACT, "a*sqrt(3)/4, geometry")},
    ),
    # ---------------------------------------------------------------- ideal wurtzite
    Prototype(
        filename="wurtzite-ZnO-ideal.cif",
        title="ZnO, ideal wurtzite (c/a = sqrt(8/3), u = 3/8)",
        hall_number=HALL_P63MC, sg_number=186, setting_note="",
        # a = 3.25 A (rounded from the measured 3.2495 A, from memory); c and u are the
        # ideal-tetrahedron values (fact of the trade), NOT the measured c = 5.2069 A, u = 0.382.
        cell=_hexagonal(3.25, 3.25 * sqrt(8.0 / 3.0)),
        sites=(Site("Zn1", "Zn2+", "2b", (1 / 3, 2 / 3, 0.0)),
               Site("O1", "O2-", "2b", (1 / 3, 2 / 3, 3 / 8))),
        oxidation={"Zn2+": 2, "O2-": -2},
        formula_unit={"Zn": 1, "O": 1}, z=2,
        source=("idealised: a = 3.25 A (rounded measured ZnO value, from memory), "
                "c = a*sqrt(8/3), u = 3/8 (ideal tetrahedra, fact of the trade)"),
        # all four Zn-O bonds equal u*c in the ideal structure (geometry)
        expected_nn={"Zn1": (3 / 8 * 3.25 * sqrt(8.0 / 3.0), EXACT, "u*c, geometry")},
    ),
    # ---------------------------------------------------------------------- fluorite
    Prototype(
        filename="fluorite-CaF2.cif",
        title="CaF2, fluorite structure",
        hall_number=HALL_FM3M, sg_number=225, setting_note="",
        cell=_cubic(5.4626),  # Wyckoff (1963); from memory
        sites=(Site("Ca1", "Ca2+", "4a", (0.0, 0.0, 0.0)),
               Site("F1", "F1-", "8c", (0.25, 0.25, 0.25))),
        oxidation={"Ca2+": 2, "F1-": -1},
        formula_unit={"Ca": 1, "F": 2}, z=4,
        source=f"a = 5.4626 A: {WYCKOFF_1963} (from memory)",
        expected_nn={"Ca1": (5.4626 * sqrt(3) / 4, EXACT, "a*sqrt(3)/4, geometry")},
    ),
    # ------------------------------------------------------------------------ rutile
    Prototype(
        filename="rutile-TiO2.cif",
        title="TiO2, rutile structure",
        hall_number=HALL_P42MNM, sg_number=136, setting_note="",
        # Abrahams & Bernstein (1971): a = 4.59373, c = 2.95812, x(O) = 0.30478 (from memory).
        # The brief had c = 2.9587; I recall 2.9581 for this paper and use it.
        cell=_tetragonal(4.5937, 2.9581),
        sites=(Site("Ti1", "Ti4+", "2a", (0.0, 0.0, 0.0)),
               Site("O1", "O2-", "4f", (0.3048, 0.3048, 0.0))),
        oxidation={"Ti4+": 4, "O2-": -2},
        formula_unit={"Ti": 1, "O": 2}, z=2,
        source=("S. C. Abrahams and J. L. Bernstein, J. Chem. Phys. 55, 3206 (1971): "
                "a = 4.5937, c = 2.9581 A, x(O) = 0.3048 (from memory)"),
        # equatorial Ti-O 1.946 A (x4), apical 1.983 A (x2): textbook rutile values, from memory
        expected_nn={"Ti1": (1.946, 0.02, "rutile equatorial Ti-O, from memory")},
    ),
    # ---------------------------------------------------------------------- corundum
    Prototype(
        filename="corundum-Al2O3.cif",
        title="alpha-Al2O3, corundum structure (hexagonal axes)",
        hall_number=HALL_R3C_H, sg_number=167, setting_note="hexagonal axes",
        # a, c from memory (room-temperature values in the 4.758-4.760 / 12.99 A range are
        # reported); positions as in Lewis, Schwarzenbach & Flack (1982), from memory.
        cell=_hexagonal(4.7589, 12.991),
        sites=(Site("Al1", "Al3+", "12c", (0.0, 0.0, 0.35216)),
               Site("O1", "O2-", "18e", (0.30624, 0.0, 0.25))),
        oxidation={"Al3+": 3, "O2-": -2},
        formula_unit={"Al": 2, "O": 3}, z=6,
        source=("a = 4.7589, c = 12.991 A (from memory); z(Al) = 0.35216, x(O) = 0.30624 "
                "as given by J. Lewis, D. Schwarzenbach and H. D. Flack, Acta Cryst. A38, "
                "733 (1982) (from memory)"),
        # Al-O 1.855 A (x3) and 1.972 A (x3): textbook corundum values, from memory
        expected_nn={"Al1": (1.855, 0.02, "corundum short Al-O, from memory")},
    ),
    # ------------------------------------------------------------------------ spinel
    Prototype(
        filename="spinel-MgAl2O4.cif",
        title="MgAl2O4, normal spinel (origin choice 2)",
        hall_number=HALL_FD3M_2, sg_number=227, setting_note="origin choice 2",
        cell=_cubic(8.0832),  # from memory (room-temperature values 8.080-8.085 A are reported)
        # origin choice 2: 8a (1/8,1/8,1/8), 16d (1/2,1/2,1/2), 32e (x,x,x) with ideal x = 1/4
        # (fact of the trade); x = 0.2624 (= 0.3874 in origin choice 1), from memory.
        sites=(Site("Mg1", "Mg2+", "8a", (0.125, 0.125, 0.125)),
               Site("Al1", "Al3+", "16d", (0.5, 0.5, 0.5)),
               Site("O1", "O2-", "32e", (0.2624, 0.2624, 0.2624))),
        oxidation={"Mg2+": 2, "Al3+": 3, "O2-": -2},
        formula_unit={"Mg": 1, "Al": 2, "O": 4}, z=8,
        source="a = 8.0832 A, x(O) = 0.2624 (origin choice 2), normal cation distribution (from memory)",
        # tetrahedral Mg-O = a*sqrt(3)*(x - 1/8) (geometry of 8a/32e);
        # octahedral Al-O about 1.93 A (textbook spinel value, from memory)
        expected_nn={"Mg1": (8.0832 * sqrt(3) * (0.2624 - 0.125), EXACT, "a*sqrt(3)*(x-1/8), geometry"),
                     "Al1": (1.93, 0.03, "spinel octahedral Al-O, from memory")},
    ),
    # -------------------------------------------------------------- inverse spinel
    Prototype(
        filename="inverse-spinel-Fe3O4.cif",
        title="Fe3O4 (magnetite), inverse spinel (origin choice 2)",
        hall_number=HALL_FD3M_2, sg_number=227, setting_note="origin choice 2",
        cell=_cubic(8.396),  # from memory (8.394-8.397 A is the usual room-temperature range)
        # Fe1: tetrahedral 8a, Fe3+. Fe2: octahedral 16d, average Fe2.5+ -> plain type "Fe",
        # no _atom_type row (see module docstring). x(O) = 0.2549 origin 2 (= 0.3799 origin 1).
        sites=(Site("Fe1", "Fe3+", "8a", (0.125, 0.125, 0.125)),
               Site("Fe2", "Fe", "16d", (0.5, 0.5, 0.5)),
               Site("O1", "O2-", "32e", (0.2549, 0.2549, 0.2549))),
        oxidation={"Fe3+": 3, "O2-": -2},
        formula_unit={"Fe": 3, "O": 4}, z=8,
        source=("a = 8.396 A, x(O) = 0.2549 (origin choice 2), room temperature, "
                "cubic phase above the Verwey transition (from memory)"),
        expected_nn={"Fe1": (8.396 * sqrt(3) * (0.2549 - 0.125), EXACT, "a*sqrt(3)*(x-1/8), geometry"),
                     # octahedral Fe-O about 2.06 A (textbook magnetite value, from memory)
                     "Fe2": (2.06, 0.03, "magnetite octahedral Fe-O, from memory")},
    ),
    # -------------------------------------------------------------------- perovskite
    Prototype(
        filename="perovskite-SrTiO3.cif",
        title="SrTiO3, cubic perovskite",
        hall_number=HALL_PM3M, sg_number=221, setting_note="",
        cell=_cubic(3.905),  # room temperature, from memory (3.905 A is the standard value)
        # Sr on 1a, Ti on 1b, O on 3c (0,1/2,1/2): one of the two equivalent origin choices
        sites=(Site("Sr1", "Sr2+", "1a", (0.0, 0.0, 0.0)),
               Site("Ti1", "Ti4+", "1b", (0.5, 0.5, 0.5)),
               Site("O1", "O2-", "3c", (0.0, 0.5, 0.5))),
        oxidation={"Sr2+": 2, "Ti4+": 4, "O2-": -2},
        formula_unit={"Sr": 1, "Ti": 1, "O": 3}, z=1,
        source="a = 3.905 A, room temperature (from memory)",
        expected_nn={"Sr1": (3.905 / sqrt(2), EXACT, "a/sqrt(2), geometry"),
                     "Ti1": (3.905 / 2, EXACT, "a/2, geometry")},
    ),
    # ---------------------------------------------------------------------- ilmenite
    Prototype(
        filename="ilmenite-FeTiO3.cif",
        title="FeTiO3, ilmenite (hexagonal axes)",
        hall_number=HALL_R3_H, sg_number=148, setting_note="hexagonal axes",
        # B. A. Wechsler and C. T. Prewitt, Am. Mineral. 69, 176 (1984), room temperature;
        # all numbers from memory.
        cell=_hexagonal(5.0884, 14.0885),
        sites=(Site("Fe1", "Fe2+", "6c", (0.0, 0.0, 0.35537)),
               Site("Ti1", "Ti4+", "6c", (0.0, 0.0, 0.14640)),
               Site("O1", "O2-", "18f", (0.3172, 0.0234, 0.2442))),
        oxidation={"Fe2+": 2, "Ti4+": 4, "O2-": -2},
        formula_unit={"Fe": 1, "Ti": 1, "O": 3}, z=6,
        source=("a = 5.0884, c = 14.0885 A; z(Fe) = 0.35537, z(Ti) = 0.14640, "
                "O (0.3172, 0.0234, 0.2442): B. A. Wechsler and C. T. Prewitt, "
                "Am. Mineral. 69, 176 (1984) (from memory)"),
        # Fe-O about 2.08 A (x3) / 2.20 A (x3), Ti-O about 1.87 A (x3) / 2.09 A (x3):
        # textbook ilmenite values, from memory
        expected_nn={"Fe1": (2.08, 0.04, "ilmenite short Fe-O, from memory"),
                     "Ti1": (1.87, 0.04, "ilmenite short Ti-O, from memory")},
    ),
    # -------------------------------------------------------------- layered LiCoO2
    Prototype(
        filename="layered-rocksalt-LiCoO2.cif",
        title="LiCoO2, layered (alpha-NaFeO2-type) ordered rock salt (hexagonal axes)",
        hall_number=HALL_R3M_H, sg_number=166, setting_note="hexagonal axes",
        # a, c, z(O) from memory (H. J. Orman and P. J. Wiseman, Acta Cryst. C40, 12 (1984)).
        cell=_hexagonal(2.8156, 14.0542),
        # With z(O) = 0.2396 the short (Co-O ~ 1.92 A) octahedron is the one around
        # (0,0,1/2), so Co sits on 3b and Li on 3a. (Equivalent description: Co 3a,
        # Li 3b, z(O) = 0.2604.)
        sites=(Site("Li1", "Li1+", "3a", (0.0, 0.0, 0.0)),
               Site("Co1", "Co3+", "3b", (0.0, 0.0, 0.5)),
               Site("O1", "O2-", "6c", (0.0, 0.0, 0.2396))),
        oxidation={"Li1+": 1, "Co3+": 3, "O2-": -2},
        formula_unit={"Li": 1, "Co": 1, "O": 2}, z=3,
        source=("a = 2.8156, c = 14.0542 A, z(O) = 0.2396: H. J. Orman and P. J. Wiseman, "
                "Acta Cryst. C40, 12 (1984) (from memory)"),
        # Co-O about 1.92 A, Li-O about 2.09 A: textbook LiCoO2 values, from memory
        expected_nn={"Co1": (1.92, 0.03, "LiCoO2 Co-O, from memory"),
                     "Li1": (2.09, 0.03, "LiCoO2 Li-O, from memory")},
    ),
    # ------------------------------------------------- layered perovskite Sr2TiO4
    Prototype(
        filename="layered-perovskite-Sr2TiO4.cif",
        title="Sr2TiO4, K2NiF4-type layered perovskite (n = 1 Ruddlesden-Popper phase)",
        hall_number=HALL_I4MMM, sg_number=139, setting_note="",
        # a = 3.884, c = 12.60 A; z(Sr) = 0.355, z(O2) = 0.152: S. N. Ruddlesden and P. Popper,
        # Acta Cryst. 10, 538 (1957) (from memory). Two inequivalent oxide sites: O1 (4c) in the
        # TiO2 planes, O2 (4e) apical, facing the SrO rock-salt layer.
        cell=_tetragonal(3.884, 12.60),
        sites=(Site("Sr1", "Sr2+", "4e", (0.0, 0.0, 0.355)),
               Site("Ti1", "Ti4+", "2a", (0.0, 0.0, 0.0)),
               Site("O1", "O2-", "4c", (0.0, 0.5, 0.0)),
               Site("O2", "O2-", "4e", (0.0, 0.0, 0.152))),
        oxidation={"Sr2+": 2, "Ti4+": 4, "O2-": -2},
        formula_unit={"Sr": 2, "Ti": 1, "O": 4}, z=2,
        source=("a = 3.884, c = 12.60 A, z(Sr) = 0.355, z(O2) = 0.152: S. N. Ruddlesden and P. Popper, "
                "Acta Cryst. 10, 538 (1957) (from memory)"),
        # shortest Ti-O is the apical z(O2)*c = 1.915 A (geometry of 2a/4e)
        expected_nn={"Ti1": (0.152 * 12.60, EXACT, "z(O2)*c, geometry")},
    ),
)


# ----------------------------------------------------------------------------- writing

def _fmt_float(v: float, digits: int = 8) -> str:
    """Fixed-point number without trailing zeros (at least one decimal)."""
    s = f"{v:.{digits}f}".rstrip("0")
    if s.endswith("."):
        s += "0"
    if s == "-0.0":
        s = "0.0"
    return s


def _fmt_fraction(t: float) -> str:
    """Translation component reduced to [0, 1) as a fraction such as '1/2' or '3/4'."""
    f = Fraction(t).limit_denominator(24) % 1
    if abs(float(f) - (t % 1.0)) > 1e-8 and abs(float(f) - (t % 1.0)) < 1 - 1e-8:
        raise ValueError(f"translation {t!r} is not a simple fraction")
    return "" if f == 0 else f"{f.numerator}/{f.denominator}"


def format_symop(rotation: np.ndarray, translation: np.ndarray) -> str:
    """Format one operation (W, w) as the CIF 'x,y,z' form, e.g. '-y+1/2,x,z+1/2'."""
    parts = []
    for row, t in zip(rotation, translation):
        term = ""
        for coeff, var in zip(row, "xyz"):
            c = int(coeff)
            if c == 0:
                continue
            sign = "-" if c < 0 else ("+" if term else "")
            mag = "" if abs(c) == 1 else str(abs(c))
            term += f"{sign}{mag}{var}"
        frac = _fmt_fraction(float(t))
        if frac:
            term += f"+{frac}"
        parts.append(term or "0")
    return ",".join(parts)


def symops_for(hall_number: int) -> list[str]:
    """All symmetry operations (centring included) of the setting, as 'x,y,z' strings."""
    sym = spglib.get_symmetry_from_database(hall_number)
    if sym is None:
        raise ValueError(f"spglib has no symmetry for Hall number {hall_number}")
    ops = [format_symop(r, t) for r, t in zip(sym["rotations"], sym["translations"])]
    if ops[0] != "x,y,z":
        raise ValueError(f"first operation of Hall number {hall_number} is not the identity")
    if len(set(ops)) != len(ops):
        raise ValueError(f"duplicate symmetry operations for Hall number {hall_number}")
    return ops


def hill_formula(counts: dict[str, int]) -> str:
    """Hill-order formula with spaces, as _chemical_formula_sum expects ('Al2 O3', 'Cl Na')."""
    if "C" in counts:
        order = ["C"] + (["H"] if "H" in counts else []) + sorted(k for k in counts if k not in ("C", "H"))
    else:
        order = sorted(counts)
    return " ".join(f"{el}{counts[el] if counts[el] != 1 else ''}" for el in order)


def _quote(s: str) -> str:
    return f"'{s}'"


def cif_text(p: Prototype) -> str:
    """The full CIF text of one prototype."""
    sgtype = spglib.get_spacegroup_type(p.hall_number)
    if sgtype.number != p.sg_number:
        raise ValueError(f"{p.filename}: Hall number {p.hall_number} is group "
                         f"{sgtype.number}, expected {p.sg_number}")
    hm = sgtype.international  # e.g. 'F d -3 m'
    choice = sgtype.choice  # '', '1', '2', 'H', 'R'
    hm_alt = f"{hm} :{choice}" if choice else hm
    a, b, c, al, be, ga = p.cell
    ca, cb, cg = (np.cos(np.radians(x)) for x in (al, be, ga))
    volume = a * b * c * sqrt(1 - ca * ca - cb * cb - cg * cg + 2 * ca * cb * cg)
    block = Path(p.filename).stem.replace("-", "_")
    ops = symops_for(p.hall_number)

    lines = [
        f"# {p.filename}",
        f"# {p.title}",
        "# Generated by structures/make_prototypes.py -- do not edit by hand; change the",
        "# table in that script and re-run it (python structures/make_prototypes.py).",
        f"# Source of the parameters: {p.source}",
        "# Oxidation numbers are formal charges (ionic limit), not measured charges.",
    ]
    if any(s.type_symbol not in p.oxidation for s in p.sites):
        lines.append("# Sites whose type symbol has no _atom_type row carry no formal oxidation")
        lines.append("# number on purpose (mixed valence); see make_prototypes.py.")
    lines += [
        "",
        f"data_{block}",
        f"_chemical_name_common                  {_quote(p.title)}",
        f"_chemical_formula_sum                  {_quote(hill_formula(p.formula_unit))}",
        f"_cell_formula_units_Z                  {p.z}",
        f"_cell_length_a                         {_fmt_float(a, 6)}",
        f"_cell_length_b                         {_fmt_float(b, 6)}",
        f"_cell_length_c                         {_fmt_float(c, 6)}",
        f"_cell_angle_alpha                      {_fmt_float(al, 4)}",
        f"_cell_angle_beta                       {_fmt_float(be, 4)}",
        f"_cell_angle_gamma                      {_fmt_float(ga, 4)}",
        f"_cell_volume                           {volume:.4f}",
        f"_symmetry_space_group_name_H-M         {_quote(hm)}",
        f"_space_group_name_H-M_alt              {_quote(hm_alt)}",
        f"_space_group_name_Hall                 {_quote(sgtype.hall_symbol)}",
        f"_space_group_IT_number                 {p.sg_number}",
    ]
    if p.setting_note:
        lines.append(f"# setting: {p.setting_note}")
    lines += ["", "loop_", "_space_group_symop_id", "_space_group_symop_operation_xyz"]
    lines += [f"{i:<4d} {_quote(op)}" for i, op in enumerate(ops, start=1)]

    lines += ["", "loop_", "_atom_type_symbol", "_atom_type_oxidation_number"]
    for sym, q in p.oxidation.items():
        lines.append(f"{sym:<6s} {q:d}")

    lines += ["", "loop_", "_atom_site_label", "_atom_site_type_symbol",
              "_atom_site_symmetry_multiplicity", "_atom_site_Wyckoff_symbol",
              "_atom_site_fract_x", "_atom_site_fract_y", "_atom_site_fract_z",
              "_atom_site_occupancy"]
    for s in p.sites:
        mult, letter = s.wyckoff[:-1], s.wyckoff[-1]
        x, y, z = (_fmt_float(v) for v in s.xyz)
        lines.append(f"{s.label:<5s} {s.type_symbol:<6s} {mult:>3s} {letter}  "
                     f"{x:>11s} {y:>11s} {z:>11s}  1.0")
    lines.append("")
    return "\n".join(lines)


def write_all(directory: Path = HERE) -> list[Path]:
    """Write every prototype's CIF into ``directory``; return the paths."""
    names = [p.filename for p in PROTOTYPES]
    if len(set(names)) != len(names):
        raise ValueError("duplicate file names in PROTOTYPES")
    paths = []
    for p in PROTOTYPES:
        path = directory / p.filename
        path.write_text(cif_text(p), encoding="ascii", newline="\n")
        paths.append(path)
    return paths


# ----------------------------------------------------------------------------- checking

def _shortest_to_anion(atoms, kinds, labels) -> dict[str, float]:
    """Shortest distance from each cation site (by label) to any anion, all images included."""
    from ase.neighborlist import neighbor_list

    i, j, d = neighbor_list("ijd", atoms, 4.5)
    symbols = np.array(atoms.get_chemical_symbols())
    is_anion = np.isin(symbols, sorted(ANION_ELEMENTS))
    out: dict[str, float] = {}
    for k, label in enumerate(labels):
        mask = (kinds[i] == k) & ~is_anion[i] & is_anion[j]
        if mask.any():
            out[label] = float(d[mask].min())
    return out


def _shortest_like_pair(atoms) -> float:
    """Shortest cation-cation or anion-anion distance (inf if none within 4.5 A)."""
    from ase.neighborlist import neighbor_list

    i, j, d = neighbor_list("ijd", atoms, 4.5)
    symbols = np.array(atoms.get_chemical_symbols())
    is_anion = np.isin(symbols, sorted(ANION_ELEMENTS))
    like = is_anion[i] == is_anion[j]
    return float(d[like].min()) if like.any() else float("inf")


def check(directory: Path = HERE) -> bool:
    """Read every CIF back with ASE and verify it; print a table. True if all checks pass."""
    import ase.io

    failures: list[str] = []
    rows = []
    for p in PROTOTYPES:
        path = directory / p.filename
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            atoms = ase.io.read(path)
        for w in caught:
            failures.append(f"{p.filename}: ASE warned while reading: {w.message}")

        counts = Counter(atoms.get_chemical_symbols())
        expected_counts = Counter({el: n * p.z for el, n in p.formula_unit.items()})
        n_expected = sum(expected_counts.values())
        if counts != expected_counts:
            failures.append(f"{p.filename}: composition {dict(counts)} != {dict(expected_counts)}")
        if len(atoms) != n_expected:
            failures.append(f"{p.filename}: {len(atoms)} atoms, expected {n_expected}")
        # formula of one formula unit recovered from the cell content
        g = 0
        for n in counts.values():
            g = gcd(g, n)
        reduced = {el: n // g for el, n in counts.items()} if g else {}
        if reduced != p.formula_unit:
            failures.append(f"{p.filename}: reduced formula {reduced} != {p.formula_unit}")

        # cell read back equals the cell written
        cellpar = atoms.cell.cellpar()
        if not np.allclose(cellpar, p.cell, atol=1e-5):
            failures.append(f"{p.filename}: cell {cellpar} != {p.cell}")

        cell = np.array(atoms.cell, dtype=float)
        frac = atoms.get_scaled_positions(wrap=True)
        numbers = atoms.get_atomic_numbers()
        ds = spglib.get_symmetry_dataset((cell, frac, numbers), symprec=1e-3)
        sg_found = ds.number if ds is not None else -1
        if sg_found != p.sg_number:
            failures.append(f"{p.filename}: spglib finds space group {sg_found}, expected {p.sg_number}")
        n_ops = len(symops_for(p.hall_number))
        if ds is not None and len(ds.rotations) != n_ops:
            failures.append(f"{p.filename}: spglib finds {len(ds.rotations)} operations in the "
                            f"conventional cell, the CIF lists {n_ops}")

        labels = [s.label for s in p.sites]
        kinds = atoms.arrays.get("spacegroup_kinds")
        if kinds is None:
            failures.append(f"{p.filename}: ASE did not report spacegroup_kinds")
            nn = {}
        else:
            nn = _shortest_to_anion(atoms, np.asarray(kinds), labels)
            per_site = Counter(int(k) for k in kinds)
            for k, s in enumerate(p.sites):
                mult = int(s.wyckoff[:-1])
                if per_site[k] != mult:
                    failures.append(f"{p.filename}: site {s.label} has {per_site[k]} atoms, "
                                    f"Wyckoff {s.wyckoff} needs {mult}")
        for label, (d_exp, tol, why) in p.expected_nn.items():
            d = nn.get(label)
            if d is None or abs(d - d_exp) > tol:
                shown = "none within 4.5 A" if d is None else f"{d:.4f} A"
                failures.append(f"{p.filename}: shortest {label}-anion distance {shown} differs from "
                                f"{d_exp:.4f} +- {tol} A ({why})")
        d_min = min(nn.values()) if nn else float("nan")
        d_like = _shortest_like_pair(atoms)
        if not (1.5 < d_min < 3.8):  # ionic cation-anion contacts: common practice range
            failures.append(f"{p.filename}: shortest cation-anion distance {d_min:.3f} A is implausible")
        if not d_like > d_min:
            failures.append(f"{p.filename}: a like-ion pair ({d_like:.3f} A) is closer than "
                            f"the shortest cation-anion pair ({d_min:.3f} A)")
        nn_text = " ".join(f"{k}:{v:.4f}" for k, v in nn.items())
        rows.append((p.filename, hill_formula(p.formula_unit), len(atoms), sg_found,
                     p.sg_number, d_min, nn_text))

    header = ("file", "formula", "atoms", "sg found", "expected", "d(cat-an)/A", "per cation site")
    widths = [max(len(header[0]), *(len(r[0]) for r in rows)), 10, 5, 8, 8, 11]
    print(f"{header[0]:<{widths[0]}}  {header[1]:<10}  {header[2]:>5}  {header[3]:>8}  "
          f"{header[4]:>8}  {header[5]:>11}  {header[6]}")
    for r in rows:
        print(f"{r[0]:<{widths[0]}}  {r[1]:<10}  {r[2]:>5d}  {r[3]:>8d}  {r[4]:>8d}  "
              f"{r[5]:>11.4f}  {r[6]}")
    if failures:
        print(f"\n{len(failures)} check(s) FAILED:")
        for f in failures:
            print("  " + f)
        return False
    print(f"\nall checks passed for {len(rows)} files")
    return True


def main() -> int:
    paths = write_all()
    print(f"wrote {len(paths)} CIF files to {HERE}")
    return 0 if check() else 1


if __name__ == "__main__":
    sys.exit(main())
