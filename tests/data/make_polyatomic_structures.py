"""Write the salts of polyatomic ions used by tests/test_polyatomic.py as P1 CIF files.

Run from the repository root::

    python tests/data/make_polyatomic_structures.py

Each structure is expanded from its space group and asymmetric unit with ``ase.spacegroup.crystal``
and written with every atom listed (space group P 1), type symbols carrying the formal oxidation
states (``C4+``, ``O2-``) as databases write them. The output is deterministic. The script checks
the bond lengths inside the ions and the shortest contacts and exits non-zero if one is off.
It uses numpy and ase only, nothing from ``madelung``.

Sources (lattice parameters and positions; all written down from memory of the cited papers, to
be re-checked against the print before use as high-precision data):

* calcite CaCO3, R-3c (hexagonal axes): a 4.9896, c 17.0610 Å, O x 0.2578 — E. Effenberger,
  K. Mereiter and J. Zemann, Z. Kristallogr. 156 (1981) 233.
* arcanite K2SO4, Pnma: a 7.476, b 5.763, c 10.071 Å — J. A. McGinnety, Acta Cryst. B28 (1972) 2845.
  K1 was remembered as x 0.6742; in the setting of the other atoms that puts it on a sulfur, and
  x 0.1742 (the same site shifted by a/2) gives K–O contacts of 2.72–3.2 Å as expected.
* alpha-KNO3 (aragonite type), published in Pmcn (a 5.4142, b 9.1654, c 6.4309 Å; J. K. Nimmo and
  B. W. Lucas, J. Phys. C 6 (1973) 201), written here in the standard setting Pnma (a' = c,
  b' = a, c' = b; x' = z, y' = x, z' = y).
* NH4Cl, CsCl type with ordered ammonium (the low-temperature arrangement, P-43m) at the room-
  temperature cell a 3.866 Å; H on (x, x, x) with N–H 1.03 Å (neutron value, from memory). An
  idealised structure: at room temperature the ammonium orientation is disordered.
* brucite Mg(OH)2, P-3m1: a 3.1432, c 4.7655 Å, O z 0.2216, H z 0.4303 — M. Catti, G. Ferraris,
  S. Hull and A. Pavese, Phys. Chem. Minerals 22 (1995) 200.
* KClO4 (barite type), Pnma: a 8.834, b 5.650, c 7.240 Å — G. B. Johansson and O. Lindqvist,
  Acta Cryst. B33 (1977) 2918. K and Cl from memory; the oxygen positions are from memory and
  adjusted so that Cl–O is 1.44 Å and the tetrahedron regular within 1 degree.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from ase.spacegroup import crystal

HERE = Path(__file__).resolve().parent

# name: (formula, states, spacegroup, cellpar, [(element, label, xyz)], ion bond (A, B, min, max))
STRUCTURES = {
    "calcite-CaCO3": ({"Ca": 2, "C": 4, "O": -2}, 167, [4.9896, 4.9896, 17.0610, 90, 90, 120],
                      [("Ca", "Ca1", (0, 0, 0)), ("C", "C1", (0, 0, 0.25)), ("O", "O1", (0.2578, 0, 0.25))],
                      ("C", "O", 1.26, 1.30)),
    "arcanite-K2SO4": ({"K": 1, "S": 6, "O": -2}, 62, [7.476, 5.763, 10.071, 90, 90, 90],
                       [("K", "K1", (0.1742, 0.25, 0.0895)), ("K", "K2", (-0.0106, 0.25, 0.7005)),
                        ("S", "S1", (0.2327, 0.25, 0.4200)), ("O", "O1", (0.0373, 0.25, 0.4160)),
                        ("O", "O2", (0.2985, 0.25, 0.5584)), ("O", "O3", (0.3014, 0.0408, 0.3521))],
                       ("S", "O", 1.44, 1.50)),
    "nitre-KNO3": ({"K": 1, "N": 5, "O": -2}, 62, [6.4309, 5.4142, 9.1654, 90, 90, 90],
                   [("K", "K1", (0.7568, 0.25, 0.4166)), ("N", "N1", (-0.0848, 0.25, 0.7548)),
                    ("O", "O1", (-0.0893, 0.25, 0.8902)), ("O", "O2", (-0.0848, 0.4492, 0.6866))],
                   ("N", "O", 1.22, 1.28)),
    "ammonium-chloride-NH4Cl": ({"N": -3, "H": 1, "Cl": -1}, 215, [3.866, 3.866, 3.866, 90, 90, 90],
                                [("N", "N1", (0, 0, 0)), ("Cl", "Cl1", (0.5, 0.5, 0.5)),
                                 ("H", "H1", (0.1538, 0.1538, 0.1538))],
                                ("N", "H", 1.00, 1.06)),
    "brucite-MgOH2": ({"Mg": 2, "O": -2, "H": 1}, 164, [3.1432, 3.1432, 4.7655, 90, 90, 120],
                      [("Mg", "Mg1", (0, 0, 0)), ("O", "O1", (1 / 3, 2 / 3, 0.2216)),
                       ("H", "H1", (1 / 3, 2 / 3, 0.4303))],
                      ("O", "H", 0.95, 1.02)),
    "potassium-perchlorate-KClO4": ({"K": 1, "Cl": 7, "O": -2}, 62, [8.834, 5.650, 7.240, 90, 90, 90],
                                    [("K", "K1", (0.1823, 0.25, 0.1590)), ("Cl", "Cl1", (0.0664, 0.25, 0.6910)),
                                     ("O", "O1", (0.9200, 0.25, 0.6045)), ("O", "O2", (0.1810, 0.25, 0.5490)),
                                     ("O", "O3", (0.0830, 0.0450, 0.8080))],
                                    ("Cl", "O", 1.42, 1.46)),
}


def _typed(element, state):
    magnitude = abs(state)
    return f"{element}{'' if magnitude == 1 else magnitude}{'+' if state > 0 else '-'}"


def build(name):
    states, group, cellpar, basis, _ = STRUCTURES[name]
    atoms = crystal([b[0] for b in basis], [b[2] for b in basis], spacegroup=group, cellpar=cellpar,
                    onduplicates="error")
    kinds = atoms.arrays["spacegroup_kinds"]
    return atoms, [basis[k][1] for k in kinds]


def write(name):
    states, group, cellpar, basis, _ = STRUCTURES[name]
    atoms, labels = build(name)
    counts = {}
    lines = [f"# generated by tests/data/make_polyatomic_structures.py (see its docstring for the source)",
             f"data_{name}", f"_chemical_name_common '{name}'"]
    for key, value in zip(("a", "b", "c"), cellpar[:3]):
        lines.append(f"_cell_length_{key} {value:.5f}")
    for key, value in zip(("alpha", "beta", "gamma"), cellpar[3:]):
        lines.append(f"_cell_angle_{key} {value:.4f}")
    lines += ["_symmetry_space_group_name_H-M 'P 1'", "loop_", "_symmetry_equiv_pos_as_xyz", "  'x, y, z'",
              "loop_", "_atom_type_symbol", "_atom_type_oxidation_number"]
    lines += [f"  {_typed(el, q)} {q}" for el, q in states.items()]
    lines += ["loop_", "_atom_site_label", "_atom_site_type_symbol", "_atom_site_fract_x", "_atom_site_fract_y",
              "_atom_site_fract_z", "_atom_site_occupancy"]
    for symbol, label, f in zip(atoms.get_chemical_symbols(), labels, atoms.get_scaled_positions()):
        counts[label] = counts.get(label, 0) + 1
        lines.append(f"  {label}_{counts[label]} {_typed(symbol, states[symbol])} "
                     f"{f[0]:.6f} {f[1]:.6f} {f[2]:.6f} 1.0")
    (HERE / f"{name}.cif").write_text("\n".join(lines) + "\n")
    return atoms


def check(name, atoms):
    """Bond lengths inside the ions within the stated range; no other contact below 1.5 Å except bonds."""
    a, b, low, high = STRUCTURES[name][4]
    d = atoms.get_all_distances(mic=True)
    symbols = np.array(atoms.get_chemical_symbols())
    problems = []
    for i in np.flatnonzero(symbols == a):
        near = sorted(d[i, symbols == b])
        expected = {"C": 3, "S": 4, "N": 4 if b == "H" else 3, "O": 1, "Cl": 4}[a]
        if not all(low <= x <= high for x in near[:expected]):
            problems.append(f"{name}: {a}-{b} bonds {np.round(near[:expected], 3)} outside {low}-{high} Å")
    np.fill_diagonal(d, np.inf)
    if d.min() < 0.9:
        problems.append(f"{name}: atoms {d.min():.3f} Å apart")
    return problems


def main():
    problems = []
    for name in STRUCTURES:
        atoms = write(name)
        problems += check(name, atoms)
        print(f"{name:<30} {atoms.get_chemical_formula():<14} {len(atoms):4d} atoms  volume {atoms.get_volume():9.3f} Å^3")
    for p in problems:
        print("PROBLEM", p)
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())
