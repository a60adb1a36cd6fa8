"""Plots as PNG files, with matplotlib's object-oriented API only.

Each function builds its own :class:`matplotlib.figure.Figure` and saves it; nothing here touches
pyplot's global state or the backend of the user's process.
"""

from __future__ import annotations

import numpy as np
from matplotlib.figure import Figure

from ..analysis.equation_of_state import birch_murnaghan
from ..errors import InputError
from ..units import EV_PER_A3_TO_GPA


def write_plane_png(path, section, title=""):
    """Heat map of a plane section (:class:`~madelung.analysis.defects.PlaneSection`) with the ions
    in the plane marked, written as a PNG."""

    u, v = section.u, section.v
    lu = np.linalg.norm(u)
    ex = u / lu
    vx, vy = float(v @ ex), float(np.linalg.norm(v - (v @ ex) * ex))
    n_u, n_v = section.values.shape
    s, t = np.meshgrid(np.arange(n_u + 1) / n_u, np.arange(n_v + 1) / n_v, indexing="ij")
    s0, t0 = s - 0.5 / n_u, t - 0.5 / n_v
    x = s0 * lu + t0 * vx
    y = t0 * vy
    limit = float(np.percentile(np.abs(section.values), 98)) or 1.0
    fig = Figure(figsize=(6.4, 5.2))
    ax = fig.subplots()
    mesh = ax.pcolormesh(x, y, section.values, cmap="PuOr_r", vmin=-limit, vmax=limit, shading="flat")
    fig.colorbar(mesh, ax=ax, label="potential / V")
    for st0, st1, label, q, _ in section.atoms:
        px, py = st0 * lu + st1 * vx, st1 * vy
        ax.plot(px, py, marker="+" if q > 0 else "o", color="black", markersize=8, mfc="none")
        ax.annotate(label, (px, py), textcoords="offset points", xytext=(4, 4), fontsize=7)
    ax.set_aspect("equal")
    ax.set_xlabel("Å along u")
    ax.set_ylabel("Å")
    h, k, l = section.miller
    ax.set_title(title or f"potential on ({h} {k} {l}) at offset {section.offset:g}"
                 + (f", ions smeared {section.smearing:g} Å" if section.smearing else ""), fontsize=9)
    try:
        fig.savefig(str(path), dpi=120, bbox_inches="tight")
    except OSError as exc:
        raise InputError(f"{path}: cannot write ({exc.strerror or exc})") from None


def save_candidate_plot(rows, path, prototypes, elements_of):
    """Scatter of energy per atom against the mean anion-site potential, one colour per prototype
    (the demo screen's rows; ``elements_of`` gives the set of element symbols of a formula)."""
    figure = Figure(figsize=(7.5, 5.0), dpi=120)
    axes = figure.subplots()
    markers = {"O": "o", "halide": "^"}
    colours = {"perovskite": "#1b6f9e", "spinel": "#c4572b", "layered-rocksalt": "#3f8f3a", "other": "#777777"}
    for prototype in (*prototypes, "other"):
        for kind in ("O", "halide"):
            chosen = [r for r in rows if r["prototype"] == prototype
                      and (("O" in elements_of(r["reduced_formula"])) == (kind == "O"))]
            if not chosen:
                continue
            axes.scatter([r["anion_potential_mean_V"] for r in chosen], [r["energy_per_atom_eV"] for r in chosen],
                         c=colours[prototype], marker=markers[kind], s=42, edgecolors="white", linewidths=0.6,
                         label=f"{prototype}, {'oxides' if kind == 'O' else 'halides'}")
    for prototype in prototypes:   # label the most strongly bound candidate of each prototype
        chosen = [r for r in rows if r["prototype"] == prototype]
        if chosen:
            best = min(chosen, key=lambda r: r["energy_per_atom_eV"])
            axes.annotate(best["reduced_formula"], (best["anion_potential_mean_V"], best["energy_per_atom_eV"]),
                          textcoords="offset points", xytext=(7, -11), fontsize=8,
                          arrowprops=dict(arrowstyle="-", lw=0.5, color="#444444"))
    axes.margins(x=0.14, y=0.08)
    axes.set_xlabel("mean electrostatic potential at the anion sites (V)")
    axes.set_ylabel("electrostatic energy per atom (eV)")
    axes.set_title("Coating candidates: point-charge electrostatics (model estimates)", fontsize=10)
    axes.grid(alpha=0.3)
    axes.legend(fontsize=8, frameon=False)
    figure.tight_layout()
    figure.savefig(path)
    return path


def write_equation_of_state_png(path, eos):
    """PNG of an energy–volume scan and its Birch–Murnaghan fit
    (:class:`~madelung.analysis.equation_of_state.EquationOfState`), per formula unit."""
    z = eos.formula_units
    fine = np.linspace(eos.volumes.min(), eos.volumes.max(), 200)
    fit = birch_murnaghan(fine, eos.e0, eos.v0, eos.b0 / EV_PER_A3_TO_GPA, eos.b0_prime)
    fig = Figure(figsize=(6, 4.2), dpi=120)
    ax = fig.subplots()
    ax.plot(fine / z, fit / z, "-", color="tab:blue", label="Birch–Murnaghan fit")
    ax.plot(eos.volumes / z, eos.energies / z, "o", color="tab:red", label="rigid-ion model")
    ax.axvline(eos.v0 / z, color="grey", lw=0.8, ls="--")
    ax.set_xlabel("volume per formula unit (Å³)")
    ax.set_ylabel("total energy per formula unit (eV)")
    ax.set_title(f"{eos.formula}: V0 = {eos.v0 / z:.3f} Å³, B0 = {eos.b0:.1f} GPa, B0' = {eos.b0_prime:.2f}")
    ax.legend(frameon=False)
    fig.tight_layout()
    fig.savefig(path)
