"""Make the demo candidates: invented ternary oxides and halides for a coating study.

The scenario (invented for this project): the three-person surface team of a small glass-coating
workshop wants a hard, strongly bound ionic top layer. Before anyone weighs powders they rank
hypothetical ternary compounds on three familiar prototypes by their electrostatic energy:

- cubic perovskite ABX3 (5 sites): A2+ B4+ oxides and A+ B2+ fluorides;
- spinel AB2X4 (56-site conventional cell): A2+ B3+ oxides and A2+ Li+ chlorides;
- layered (ordered) rock salt ABX2 (12-site hexagonal cell): A+ B3+ oxides and A+ B+ fluorides.

Most combinations are made up; the geometry is idealized, not relaxed. Each cell is scaled so that
its cation–anion contacts match the sums of the two ionic radii on average (the radii below are
approximate six-fold values written from memory, good enough for illustrative cells; see
:func:`scaled`). The files
are P1 CIFs with the oxidation states in ``_atom_type_oxidation_number``, one candidate per file,
named ``<prototype>-<formula>.cif``. One extra file, ``partner-upload-truncated.cif``, is cut
short on purpose: the team's collaborator's upload broke, and the screen must record it and go on.

Run: ``python structures/demo/make_demo.py [OUT_DIR]`` (default: this folder).
"""

from __future__ import annotations

import itertools
import os
import sys

import numpy as np

#: Approximate ionic radii, Å, six-fold coordination (from memory).
RADII = {
    "Li": 0.76, "Na": 1.02, "K": 1.38, "Rb": 1.52, "Cs": 1.67,
    "Mg": 0.72, "Ca": 1.00, "Sr": 1.18, "Ba": 1.35, "Zn": 0.74, "Mn": 0.83, "Ni": 0.69, "Co": 0.745,
    "Al": 0.535, "Ga": 0.62, "Cr": 0.615, "Fe": 0.645, "In": 0.80, "Sc": 0.745,
    "Ti": 0.605, "Zr": 0.72, "Hf": 0.71, "Sn": 0.69,
    "O": 1.40, "F": 1.33, "Cl": 1.81,
}

#: Approximate twelve-fold radii for the perovskite A site, Å (from memory).
RADII_A12 = {"Ca": 1.34, "Sr": 1.44, "Ba": 1.61, "K": 1.64, "Rb": 1.72, "Cs": 1.88}


def _from_space_group(number, basis, elements, cellpar, setting=1):
    """Unit-scale cell and fractional sites of a structure given by its asymmetric unit (ASE expands it)."""
    from ase.spacegroup import crystal

    atoms = crystal(elements, basis=basis, spacegroup=number, setting=setting, cellpar=cellpar,
                    primitive_cell=False)
    cell = np.array(atoms.cell)
    return cell / np.linalg.norm(cell[0]), list(zip(atoms.get_chemical_symbols(), map(tuple, atoms.get_scaled_positions())))


def perovskite(a_el, b_el, x_el):
    """Cubic perovskite, Pm-3m: A on 1b, B on 1a, X on 3d."""
    return _from_space_group(221, [(0.5, 0.5, 0.5), (0, 0, 0), (0.5, 0, 0)], [a_el, b_el, x_el], [1, 1, 1, 90, 90, 90])


def spinel(a_el, b_el, x_el, u=0.2625):
    """Normal spinel, Fd-3m origin choice 2: A on 8a, B on 16d, X on 32e (x = u, about 0.26 for
    oxide spinels, from memory)."""
    return _from_space_group(227, [(0.125, 0.125, 0.125), (0.5, 0.5, 0.5), (u, u, u)], [a_el, b_el, x_el],
                             [1, 1, 1, 90, 90, 90], setting=2)


def layered_rocksalt(a_el, b_el, x_el):
    """Ordered rock salt with alternating cation layers along [111], R-3m on hexagonal axes: A on 3a,
    B on 3b, X on 6c with z = 1/4 (ideal cubic close packing, c/a = 2 sqrt 6)."""
    return _from_space_group(166, [(0, 0, 0), (0, 0, 0.5), (0, 0, 0.25)], [a_el, b_el, x_el],
                             [1, 1, 2 * np.sqrt(6.0), 90, 90, 120])


def scaled(cell, sites, charges, radii=RADII):
    """Scale the cell so that its cation–anion contacts match the sums of the ionic radii on average.

    For every cation kind the shortest contact to an anion is compared with r_cation + r_anion; the
    cell takes the mean of the required scale factors (a Vegard-like compromise: in one idealized
    cell the larger cation is a little squeezed and the smaller one a little loose, as in the
    ordered structures these prototypes stand for).
    """
    frac = np.array([p for _, p in sites])
    elements = [e for e, _ in sites]
    shifts = np.array(list(itertools.product((-1, 0, 1), repeat=3)))
    need = {}
    for i, j in itertools.product(range(len(sites)), repeat=2):
        if charges[elements[i]] <= 0 or charges[elements[j]] >= 0:
            continue
        d = ((frac[j] - frac[i] + shifts) @ cell)
        shortest = np.min(np.linalg.norm(d, axis=1))
        ratio = (radii[elements[i]] + radii[elements[j]]) / shortest
        need[elements[i]] = max(need.get(elements[i], 0.0), ratio)
    return cell * float(np.mean(list(need.values())))


CANDIDATES = (
    [("perovskite", a, b, "O", {a: 2, b: 4, "O": -2}) for a in ("Ca", "Sr", "Ba") for b in ("Ti", "Zr", "Hf", "Sn")]
    + [("perovskite", a, b, "F", {a: 1, b: 2, "F": -1}) for a in ("K", "Rb", "Cs") for b in ("Mg", "Zn", "Ni", "Mn")]
    + [("spinel", a, b, "O", {a: 2, b: 3, "O": -2}) for a in ("Mg", "Zn", "Ni") for b in ("Al", "Ga", "Cr")]
    + [("spinel", a, "Li", "Cl", {a: 2, "Li": 1, "Cl": -1}) for a in ("Mg", "Mn", "Zn")]
    + [("layered-rocksalt", a, b, "O", {a: 1, b: 3, "O": -2}) for a in ("Li", "Na") for b in ("Al", "Cr", "Fe", "Sc", "In")]
    + [("layered-rocksalt", a, b, "F", {a: 1, b: 1, "F": -1}) for a, b in (("Li", "Na"), ("Na", "K"), ("K", "Rb"))]
)

BUILDERS = {"perovskite": perovskite, "spinel": spinel, "layered-rocksalt": layered_rocksalt}
FORMULA = {"perovskite": "{a}{b}{x}3", "spinel": "{a}{b}2{x}4", "layered-rocksalt": "{a}{b}{x}2"}


def cif_text(name, cell, sites, charges, note):
    lengths = np.linalg.norm(cell, axis=1)
    angle = lambda u, v: np.degrees(np.arccos(np.dot(u, v) / np.linalg.norm(u) / np.linalg.norm(v)))  # noqa: E731
    alpha, beta, gamma = angle(cell[1], cell[2]), angle(cell[0], cell[2]), angle(cell[0], cell[1])
    typed = {el: f"{el}{abs(q) if abs(q) != 1 else ''}{'+' if q > 0 else '-'}" for el, q in charges.items()}
    lines = [f"data_{name}", f"# {note}", f"_cell_length_a {lengths[0]:.6f}", f"_cell_length_b {lengths[1]:.6f}",
             f"_cell_length_c {lengths[2]:.6f}", f"_cell_angle_alpha {alpha:.6f}", f"_cell_angle_beta {beta:.6f}",
             f"_cell_angle_gamma {gamma:.6f}", "_symmetry_space_group_name_H-M 'P 1'", "_symmetry_Int_Tables_number 1",
             "loop_", "_symmetry_equiv_pos_as_xyz", "  'x, y, z'",
             "loop_", "_atom_type_symbol", "_atom_type_oxidation_number"]
    lines += [f"  {typed[el]} {q:+d}" for el, q in charges.items()]
    lines += ["loop_", "_atom_site_label", "_atom_site_type_symbol", "_atom_site_fract_x", "_atom_site_fract_y",
              "_atom_site_fract_z", "_atom_site_occupancy"]
    counts = {}
    for element, p in sites:
        counts[element] = counts.get(element, 0) + 1
        lines.append(f"  {element}{counts[element]} {typed[element]} {p[0] % 1:.6f} {p[1] % 1:.6f} {p[2] % 1:.6f} 1")
    return "\n".join(lines) + "\n"


def make(out_dir):
    """Write the candidate CIFs into ``out_dir``; returns their paths."""
    os.makedirs(out_dir, exist_ok=True)
    paths = []
    for prototype, a, b, x, charges in CANDIDATES:
        cell, sites = BUILDERS[prototype](a, b, x)
        radii = {**RADII, a: RADII_A12[a]} if prototype == "perovskite" else RADII
        cell = scaled(cell, sites, charges, radii)
        formula = FORMULA[prototype].format(a=a, b=b, x=x)
        name = f"{prototype}-{formula}"
        text = cif_text(name, cell, sites, charges,
                        f"hypothetical {prototype} candidate for the coating screen; idealized, unrelaxed geometry")
        path = os.path.join(out_dir, f"{name}.cif")
        with open(path, "w") as handle:
            handle.write(text)
        paths.append(path)
    # the broken upload: a good file cut off in the middle of its atom-site table
    good = open(paths[0]).read()
    cut = good[: good.index("_atom_site_occupancy") + 40]
    path = os.path.join(out_dir, "partner-upload-truncated.cif")
    with open(path, "w") as handle:
        handle.write(cut)
    paths.append(path)
    return paths


if __name__ == "__main__":
    folder = sys.argv[1] if len(sys.argv) > 1 else os.path.dirname(os.path.abspath(__file__))
    written = make(folder)
    print(f"wrote {len(written)} candidate files to {folder}")
