"""Printing: JSON output, report lines shared by several commands, notes on the model's limits."""

from __future__ import annotations

import re
import sys

import numpy as np

from ..report.serialize import NonFiniteResult, write_json
from ..units import EV_TO_KJ_PER_MOL


MODEL_NOTE = ("Point-charge model: with formal charges the electrostatic terms overstate what a real, "
              "partly covalent solid holds. Results are model estimates, not measured properties.")


#: Charge summaries list at most this many entries.
SUMMARY_ENTRIES = 12


def _charge_summary(crystal):
    """Charges per site label when the labels name orbits (a CIF), else per element and charge, with
    counts: never one entry per site of a large cell."""
    by_label = {}
    for i, (label, q) in enumerate(zip(crystal.labels, crystal.charges)):
        by_label.setdefault((label, round(float(q), 9)), []).append(i)
    if len(by_label) > SUMMARY_ENTRIES:
        by_label = {}
        for i, q in enumerate(crystal.charges):
            by_label.setdefault((crystal.species_label(i), round(float(q), 9)), []).append(i)
    entries = [f"{name} {q:+g}" + (f" x{len(sites)}" if len(sites) > 1 else "")
               for (name, q), sites in by_label.items()]
    more = len(entries) - SUMMARY_ENTRIES
    return ", ".join(entries[:SUMMARY_ENTRIES]) + (f" and {more} more kinds" if more > 0 else "")


def _fmt(value, digits=6):
    return "undefined" if value is None else f"{value:.{digits}f}"


def _print_json(data):
    """Print a command's result as JSON through the one serializer (:mod:`madelung.report.serialize`)."""
    write_json(data)


def _structure_lines(crystal):
    return [f"  structure   {crystal.formula} ({crystal.formula_units} x {crystal.reduced_formula}), "
            f"{len(crystal)} ions, cell volume {crystal.volume:.4f} Å^3",
            f"  charges     {_charge_summary(crystal)}  (net {crystal.net_charge:+.6g} e)"]


def _accuracy_lines(result):
    p = result.params
    return [f"  accuracy    tol {result.tol:.1e} relative to {result.energy_scale:.6g} eV "
            f"(k_e sum q^2 / d_min); estimated error {result.error_estimate:.2e} eV",
            f"  Ewald sum   {p.method}: alpha {p.alpha:.5f} 1/Å, real cutoff {p.real_cutoff:.3f} Å "
            f"({p.real_space_pairs} terms), reciprocal cutoff {p.reciprocal_cutoff:.3f} 1/Å "
            f"({p.k_vectors} k-vectors), {result.seconds * 1000:.1f} ms"] + (
        [f"  mesh        {'x'.join(str(k) for k in p.extra['mesh'])} points, B-spline order {p.extra['order']}"]
        if p.method == "mesh" else [])


def _ewald_json(result):
    p = result.params
    return {
        "energy_eV": result.energy, "energy_per_atom_eV": result.energy_per_atom,
        "error_estimate_eV": result.error_estimate, "tol": result.tol, "energy_scale_eV": result.energy_scale,
        "components_eV": result.components, "net_charge_e": result.net_charge,
        "neutralizing_background": result.background,
        "parameters": {"method": p.method, "alpha_per_angstrom": p.alpha, "real_cutoff_angstrom": p.real_cutoff,
                       "reciprocal_cutoff_per_angstrom": p.reciprocal_cutoff,
                       "real_space_terms": p.real_space_pairs, "k_vectors": p.k_vectors, **p.extra},
        "seconds": result.seconds,
    }


def _frac(f):
    return "(" + ", ".join(f"{x:.4f}" for x in f) + ")"


def _eps_text(eps):
    if np.allclose(eps, eps[0, 0] * np.eye(3)):
        return f"{eps[0, 0]:g}"
    return "[" + "; ".join(" ".join(f"{x:g}" for x in row) for row in eps) + "]"


def _batch_code(failed, total, what):
    """The exit code of a command over several inputs, as a function to call after printing:
    0 when all succeeded, else 2 with a summary line on stderr."""
    def code():
        if not failed:
            return 0
        print(f"madelung: {failed} of {total} {what} failed (messages above)", file=sys.stderr)
        return 2
    return code


RIGID_ION_NOTE = ("Rigid-ion model: formal point charges plus fitted short-range terms; no polarisation, "
                  "covalency, zero-point or thermal energy. Results are model estimates.")


def _lattice_lines(result):
    kj = EV_TO_KJ_PER_MOL
    cell, atom, fu = result.per_cell(), result.per_atom(), result.per_formula_unit()
    lines = ["  rigid-ion energy (signed sums)          per cell / eV    per ion / eV   per formula unit / eV   kJ/mol",
             *[f"      {name:<32} {cell[key]:14.6f} {atom[key]:14.6f} {fu[key]:16.6f} {fu[key] * kj:14.2f}"
               for name, key in (("Coulomb (Ewald)", "coulomb"), ("short range (repulsion)", "short_range"),
                                 ("total", "total"))],
             f"  lattice energy  U = {result.lattice_energy:.6f} eV = {result.lattice_energy_kj_per_mol:.2f} kJ/mol "
             f"per {result.formula}   (positive: energy to separate the solid into gaseous ions)",
             f"  pressure        {result.pressure:.5f} GPa (zero at the structure the parameters were fitted to)"]
    forms = result.closed_forms
    if forms is not None:
        lines.append("  closed forms beside the model (kJ/mol per formula unit)")
        if forms.madelung_constant is None:
            lines.append(f"      Born–Landé, Born–Mayer not applicable: {forms.notes.get('born_mayer', '')}")
        else:
            lines.append(f"      Madelung constant (handbook convention) {forms.madelung_constant:.6f}, "
                         f"r0 {forms.r0:.4f} Å, charges +{forms.charges[0]:g}/-{forms.charges[1]:g}")
            if forms.born_lande is not None:
                lines.append(f"      Born–Landé     {forms.born_lande * kj:10.2f}   n = {forms.born_exponent:g} "
                             f"({forms.born_exponent_source})")
            else:
                lines.append(f"      Born–Landé     not applicable: {forms.notes.get('born_lande')}")
            lines.append(f"      Born–Mayer     {forms.born_mayer * kj:10.2f}   rho = {forms.rho:.4f} Å "
                         f"({forms.rho_source})")
        if forms.kapustinskii is not None:
            lines.append(f"      Kapustinskii   {forms.kapustinskii * kj:10.2f}   Shannon radii (VI) "
                         f"r+ {forms.radii[0]:.3f} Å, r- {forms.radii[1]:.3f} Å")
        elif "kapustinskii" in forms.notes:
            lines.append(f"      Kapustinskii   not applicable: {forms.notes['kapustinskii']}")
    return lines


RULE_TEXT = {"centre": "whole charge at the ion's centre", "formal": "spread over its atoms by formal states",
             "equilibrated": "spread over its atoms by charge equilibration within the ion"}


def _volume_based(crystal, found=None):
    from ..analysis.volume_based import volume_based_energies

    return volume_based_energies(crystal, found)


def _volume_based_lines(vb, kapustinskii=True):
    fit = (f"alpha {vb.coefficients[0]}, beta {vb.coefficients[1]}" if vb.coefficients[1] is not None
           else f"A {vb.coefficients[0]}")
    lines = [f"      volume-based   {vb.volume_based:10.2f}   Glasser–Jenkins, V_m {vb.volume_per_formula_unit:.3f} Å^3, "
             f"I = {vb.ionic_strength:g}, {vb.salt_type} fit ({fit})"]
    if kapustinskii and vb.kapustinskii is not None:
        radii = ", ".join(f"{ion} {r:.3f} Å" for ion, r in vb.radii.items())
        lines.append(f"      Kapustinskii   {vb.kapustinskii:10.2f}   with thermochemical radii of polyatomic ions: "
                     f"{radii}")
    lines += [f"      ({note})" for note in vb.notes]
    return lines


class _FiniteOutput:
    """Standard output of a command: text holding a NaN or an infinity is refused, not printed."""

    NON_FINITE = re.compile(r"(?<![\w./])[-+]?(?:nan|inf)(?![\w./-])")

    def __init__(self, stream):
        self.stream = stream

    def write(self, text):
        if self.NON_FINITE.search(text):
            raise NonFiniteResult("a result is not a finite number (NaN or infinity); not printed")
        return self.stream.write(text)

    def __getattr__(self, name):
        return getattr(self.stream, name)
