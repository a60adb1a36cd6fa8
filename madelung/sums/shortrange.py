"""Short-range pair terms: Born–Landé, Born–Mayer and Buckingham, with per-ion-pair parameters.

The Coulomb sum of point charges has no minimum; the short-range terms supply the repulsion
of overlapping closed shells (and, for Buckingham, the dispersion attraction). Each pair of
ion species (by element symbol) has one form:

``born-lande``   phi(r) = B / r^n                       B in eV Å^n, n dimensionless
``born-mayer``   phi(r) = A exp(-r / rho)               A in eV, rho in Å
``buckingham``   phi(r) = A exp(-r / rho) - C / r^6     A in eV, rho in Å, C in eV Å^6
``none``         no short-range term (e.g. like-charged ions kept apart by the Coulomb sum)

Cutoff handling: every pair term is multiplied by a C2-continuous quintic switching function
that is 1 below ``cutoff - switch_width`` and goes smoothly to 0 at ``cutoff`` (defaults
10 Å and 2 Å), so energy, forces and stress stay continuous as ions cross the cutoff. The
switched model *is* the model: parameters fitted with it reproduce the fitted structure with
it. Beyond the cutoff nothing is added (no tail correction); for B/r^n and C/r^6 terms with
a large ``n`` or small ``C`` the truncation is negligible at the default cutoff.

Parameter files are JSON of this project's own design (see :func:`RepulsionModel.to_dict`)::

    {"madelung_repulsion": 1,
     "cutoff": 10.0, "switch_width": 2.0,
     "pairs": [{"ions": ["Na", "Cl"], "form": "born-mayer", "A": 1500.0, "rho": 0.32},
               {"ions": ["Na", "Na"], "form": "none"},
               {"ions": ["Cl", "Cl"], "form": "none"}]}

Lengths in Å, energies in eV. Every pair of species present in a structure must be listed
(``"form": "none"`` to switch a pair off); a missing pair is an error, never a silent zero.

The model is a rigid-ion model: ions are point charges with no polarisability; results are
model estimates.

References
----------
M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210 (inverse-power repulsion).
M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1 (exponential repulsion).
R. A. Buckingham, Proc. R. Soc. Lond. A 168 (1938) 264 (exp-6 potential).
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError
from .geometry import build_bins, thread_budget
from ._kernels import shortrange_kernels

#: Parameters of each form, in the order stored.
FORMS = {
    "born-lande": ("B", "n"),
    "born-mayer": ("A", "rho"),
    "buckingham": ("A", "rho", "C"),
    "none": (),
}

#: Units of every parameter (lengths Å, energies eV).
PARAMETER_UNITS = {"B": "eV Å^n", "n": "1", "A": "eV", "rho": "Å", "C": "eV Å^6"}

DEFAULT_CUTOFF = 10.0
DEFAULT_SWITCH_WIDTH = 2.0
#: Rough cost of one examined pair of the short-range sum, ns (an exponential or a power for the
#: third or so inside the cutoff), for the thread budget; each pair is examined once (half stencil).
EXAMINED_PAIR_NS = 12.0
FILE_KEY = "madelung_repulsion"
FILE_VERSION = 1


def _pair_key(a, b):
    return tuple(sorted((str(a), str(b))))


@dataclass(frozen=True)
class PairPotential:
    """One short-range term between two ion species.

    Attributes
    ----------
    ions : the two element symbols, sorted.
    form : "born-lande", "born-mayer", "buckingham" or "none".
    params : parameter values by name (see ``FORMS`` and ``PARAMETER_UNITS``).
    uncertainty : one-standard-deviation uncertainty of fitted parameters, by name (may be empty).
    """

    ions: tuple
    form: str
    params: dict
    uncertainty: dict = field(default_factory=dict)

    def row(self):
        """(B, n, A, 1/rho, C) for the kernel table."""
        p = self.params
        if self.form == "born-lande":
            return (p["B"], p["n"], 0.0, 0.0, 0.0)
        if self.form == "born-mayer":
            return (0.0, 0.0, p["A"], 1.0 / p["rho"], 0.0)
        if self.form == "buckingham":
            return (0.0, 0.0, p["A"], 1.0 / p["rho"], p["C"])
        return (0.0, 0.0, 0.0, 0.0, 0.0)

    def energy(self, r):
        """Unswitched pair energy phi(r) in eV at distances ``r`` (Å)."""
        r = np.asarray(r, dtype=float)
        b, n, a, inv_rho, c = self.row()
        value = np.zeros_like(r)
        if b:
            value = value + b * r ** (-n)
        if a:
            value = value + a * np.exp(-r * inv_rho)
        if c:
            value = value - c / r ** 6
        return value


@dataclass(frozen=True)
class RepulsionModel:
    """A set of short-range pair terms with its cutoff.

    Attributes
    ----------
    pairs : tuple of :class:`PairPotential`, one per species pair.
    cutoff : Å; pair terms vanish beyond it.
    switch_width : Å; the switching function acts between ``cutoff - switch_width`` and ``cutoff``.
    info : free-form provenance (e.g. the fit report), kept in the file under ``"fit"``.
    source : the file it was read from, if any (named in errors).
    """

    pairs: tuple
    cutoff: float = DEFAULT_CUTOFF
    switch_width: float = DEFAULT_SWITCH_WIDTH
    info: dict = field(default_factory=dict)
    source: str | None = None

    def __post_init__(self):
        where = f"{self.source}: " if self.source else ""
        if not (math.isfinite(self.cutoff) and self.cutoff > 0):
            raise InputError(f"{where}cutoff must be a positive number of Å, got {self.cutoff!r}")
        if not (math.isfinite(self.switch_width) and 0 < self.switch_width <= self.cutoff):
            raise InputError(f"{where}switch_width must lie in (0, cutoff], got {self.switch_width!r}")
        seen = set()
        for pair in self.pairs:
            if pair.ions in seen:
                raise InputError(f"{where}the pair {'-'.join(pair.ions)} is listed twice")
            seen.add(pair.ions)

    def pair(self, a, b) -> PairPotential | None:
        key = _pair_key(a, b)
        for pair in self.pairs:
            if pair.ions == key:
                return pair
        return None

    def replace_pairs(self, pairs, info=None) -> "RepulsionModel":
        return RepulsionModel(tuple(pairs), self.cutoff, self.switch_width,
                              self.info if info is None else info, self.source)

    def table(self, symbols):
        """Species index per site and the (S, S, 5) kernel table; a missing pair is an InputError."""
        species = sorted(set(symbols))
        index = {s: k for k, s in enumerate(species)}
        table = np.zeros((len(species), len(species), 5))
        for a in species:
            for b in species:
                pair = self.pair(a, b)
                if pair is None:
                    where = f"{self.source}: " if self.source else ""
                    raise InputError(f"{where}no short-range parameters for the ion pair {a}-{b}; add a pair "
                                     f'{{"ions": ["{a}", "{b}"], "form": ...}} (form "none" to leave it out)')
                table[index[a], index[b]] = pair.row()
        sites = np.array([index[s] for s in symbols], dtype=np.int64)
        return sites, np.ascontiguousarray(table)

    # ------------------------------------------------------------ file I/O
    def to_dict(self) -> dict:
        """The JSON document: ``madelung_repulsion`` (format version), ``units``, ``cutoff``,
        ``switch_width``, ``pairs`` (``ions``, ``form``, the form's parameters and optionally
        ``uncertainty``), and ``fit`` (provenance, optional)."""
        pairs = []
        for pair in self.pairs:
            entry = {"ions": list(pair.ions), "form": pair.form}
            entry.update({k: float(pair.params[k]) for k in FORMS[pair.form]})
            if pair.uncertainty:
                entry["uncertainty"] = {k: float(v) for k, v in pair.uncertainty.items()}
            pairs.append(entry)
        data = {FILE_KEY: FILE_VERSION,
                "units": {"length": "Å", "energy": "eV", **PARAMETER_UNITS},
                "cutoff": self.cutoff, "switch_width": self.switch_width, "pairs": pairs}
        if self.info:
            data["fit"] = self.info
        return data

    def save(self, path):
        """Write the model as a JSON parameter file."""
        with open(path, "w", encoding="utf-8") as handle:
            json.dump(self.to_dict(), handle, indent=2, ensure_ascii=False, allow_nan=False)
            handle.write("\n")

    @classmethod
    def from_dict(cls, data, source=None) -> "RepulsionModel":
        """Build from the JSON document; every shape problem is an InputError naming the entry."""
        where = f"{source}: " if source else ""
        if not isinstance(data, dict):
            raise InputError(f"{where}a repulsion parameter file must hold a JSON object, got {type(data).__name__}")
        if data.get(FILE_KEY) != FILE_VERSION:
            raise InputError(f'{where}not a repulsion parameter file: expected "{FILE_KEY}": {FILE_VERSION} '
                             "at the top level")
        unknown = sorted(set(data) - {FILE_KEY, "units", "cutoff", "switch_width", "pairs", "fit", "comment"})
        if unknown:
            raise InputError(f"{where}unknown top-level key {unknown[0]!r}")
        cutoff = _number(data.get("cutoff", DEFAULT_CUTOFF), "cutoff", where)
        width = _number(data.get("switch_width", DEFAULT_SWITCH_WIDTH), "switch_width", where)
        raw_pairs = data.get("pairs")
        if not isinstance(raw_pairs, list) or not raw_pairs:
            raise InputError(f'{where}"pairs" must be a non-empty list of pair entries')
        pairs = []
        for k, entry in enumerate(raw_pairs):
            label = f"pairs[{k}]"
            if not isinstance(entry, dict):
                raise InputError(f"{where}{label} must be an object with ions, form and parameters")
            ions = entry.get("ions")
            if not (isinstance(ions, list) and len(ions) == 2 and all(isinstance(x, str) and x for x in ions)):
                raise InputError(f'{where}{label}: "ions" must be a list of two element symbols, got {ions!r}')
            label = f"pairs[{k}] ({'-'.join(ions)})"
            form = entry.get("form")
            if form not in FORMS:
                raise InputError(f"{where}{label}: form {form!r} is not one of {', '.join(FORMS)}")
            names = FORMS[form]
            extra = sorted(set(entry) - {"ions", "form", "uncertainty", *names})
            if extra:
                raise InputError(f"{where}{label}: {extra[0]!r} is not a parameter of the {form} form "
                                 f"(it takes {', '.join(names) or 'none'})")
            params = {}
            for name in names:
                if name not in entry:
                    raise InputError(f"{where}{label}: the {form} form needs {name} ({PARAMETER_UNITS[name]})")
                params[name] = _number(entry[name], f"{label} {name}", where)
            _check_params(form, params, f"{where}{label}")
            uncertainty = entry.get("uncertainty", {})
            if not isinstance(uncertainty, dict):
                raise InputError(f'{where}{label}: "uncertainty" must be an object of parameter: value')
            uncertainty = {str(n): _number(v, f"{label} uncertainty {n}", where) for n, v in uncertainty.items()}
            pairs.append(PairPotential(_pair_key(*ions), form, params, uncertainty))
        info = data.get("fit", {})
        return cls(tuple(pairs), cutoff, width, info if isinstance(info, dict) else {}, source)

    @classmethod
    def load(cls, path) -> "RepulsionModel":
        """Read a JSON parameter file written by :meth:`save` (or by hand)."""
        path = os.fspath(path)
        if not os.path.isfile(path):
            raise InputError(f"{path}: no such parameter file")
        try:
            with open(path, encoding="utf-8") as handle:
                data = json.load(handle)
        except json.JSONDecodeError as exc:
            raise InputError(f"{path}: not valid JSON ({exc.msg} at line {exc.lineno})") from None
        return cls.from_dict(data, source=path)


def _number(value, name, where):
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise InputError(f"{where}{name} must be a finite number, got {value!r}")
    return float(value)


def _check_params(form, params, where):
    for name in ("A", "B", "C"):
        if name in params and params[name] < 0:
            raise InputError(f"{where}: {name} must not be negative, got {params[name]:g}")
    if "rho" in params and params["rho"] <= 0:
        raise InputError(f"{where}: rho must be positive, got {params['rho']:g} Å")
    if "n" in params and params["n"] <= 0:
        raise InputError(f"{where}: n must be positive, got {params['n']:g}")


def load_repulsion(path_or_model) -> RepulsionModel:
    """A :class:`RepulsionModel` from a model, a parameter-file path or a parsed JSON dict."""
    if isinstance(path_or_model, RepulsionModel):
        return path_or_model
    if isinstance(path_or_model, dict):
        return RepulsionModel.from_dict(path_or_model)
    return RepulsionModel.load(path_or_model)


@dataclass(frozen=True)
class ShortRangeResult:
    """Short-range energy of one structure.

    Attributes
    ----------
    energy : eV per cell (positive for net repulsion).
    site_energies : (N,) eV, half of each pair term given to each ion.
    forces : (N, 3) eV/Å, or None.
    stress : (3, 3) eV/Å^3 (ASE sign: (1/V) dE/d strain), or None.
    pairs : number of (i, j, image) terms inside the cutoff.
    cutoff, switch_width : Å.
    """

    energy: float
    site_energies: np.ndarray
    forces: np.ndarray | None
    stress: np.ndarray | None
    pairs: int
    cutoff: float
    switch_width: float

    def to_dict(self) -> dict:
        """JSON-ready: energy eV per cell, site energies eV, forces eV/Å and stress eV/Å^3 (None
        unless asked), pair terms summed, cutoff and switch width Å."""
        def listed(array):
            return None if array is None else np.asarray(array).tolist()

        return {"energy_eV": self.energy, "site_energies_eV": listed(self.site_energies),
                "forces_eV_per_angstrom": listed(self.forces), "stress_eV_per_cubic_angstrom": listed(self.stress),
                "pairs": self.pairs, "cutoff_angstrom": self.cutoff, "switch_width_angstrom": self.switch_width}


def shortrange(crystal, model, forces=False, stress=False) -> ShortRangeResult:
    """Energy, forces and stress of the short-range pair terms of ``model`` in ``crystal``.

    Parameters
    ----------
    crystal : Crystal
        Cell, positions and element symbols (charges are not used).
    model : RepulsionModel, dict or path
        The pair terms; every species pair present must be listed.
    forces, stress : bool
        Also return forces (eV/Å) and stress (eV/Å^3, ASE sign).

    Returns
    -------
    ShortRangeResult

    References
    ----------
    M. Born and J. E. Mayer, Z. Phys. 75 (1932) 1; R. A. Buckingham, Proc. R. Soc. Lond. A 168 (1938) 264;
    M. Born and A. Landé, Verh. Dtsch. Phys. Ges. 20 (1918) 210.
    """
    model = load_repulsion(model)
    sites, table = model.table(crystal.symbols)
    cell = np.ascontiguousarray(crystal.cell, dtype=np.float64)
    bins = build_bins(cell, crystal.positions, model.cutoff)
    r_on = model.cutoff - model.switch_width
    examined = len(crystal) ** 2 * bins.examined_volume / crystal.volume / 2
    with thread_budget(examined * EXAMINED_PAIR_NS):  # small cells on one thread
        energy, f, w, pairs = shortrange_kernels.pair_terms(
            bins.positions, np.ascontiguousarray(sites[bins.order]), bins.cell, bins.counts, bins.offsets,
            bins.bin_of, bins.bin_start, table, float(r_on), float(model.cutoff), bool(forces), bool(stress))
    site_energies = bins.unsorted(energy)
    force_array = bins.unsorted(f) if forces else None
    stress_array = None
    if stress:
        s = w.sum(axis=0)
        stress_array = np.array([[s[0], s[5], s[4]], [s[5], s[1], s[3]], [s[4], s[3], s[2]]]) / crystal.volume
    return ShortRangeResult(float(site_energies.sum()), site_energies, force_array, stress_array, int(pairs),
                            model.cutoff, model.switch_width)
