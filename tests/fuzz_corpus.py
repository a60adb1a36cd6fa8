"""Corpus of corrupted structure files for the fuzz test, and a runner for a large corpus.

``make_case(rng)`` turns a random generator into one case: a CIF, POSCAR or extended-XYZ text
(bytes) corrupted by a few mutations -- byte flips, truncations, deleted and duplicated lines,
numbers replaced by extreme values (1e308, NaN, 400-digit integers, ...), very long lines,
non-UTF-8 bytes, atom counts in the header claiming a billion atoms -- and the command line to
run on it (``energy``, ``sites``, ``constant`` or ``charges`` with some of their options).

``classify(code, out, err)`` names the outcome; only ``result`` and ``clean error`` are allowed.

Run a large corpus once (each case in a worker process with a time limit; a worker that hangs
is killed and a worker that crashes is replaced, and both are counted)::

    PYTHONPATH=. python tests/fuzz_corpus.py --cases 4000 --workers 2 --seconds 30
"""

from __future__ import annotations

import argparse
import io
import os
import random
import re
import sys
import time
from contextlib import redirect_stderr, redirect_stdout

HERE = os.path.dirname(os.path.abspath(__file__))
STRUCTURES = os.path.join(os.path.dirname(HERE), "structures")

A = 2.8201   # half the rock-salt lattice constant of NaCl, 5.6402 Å (the bundled CIF)
POSCAR = (f"NaCl rock salt, primitive cell\n1.0\n0 {A} {A}\n{A} 0 {A}\n{A} {A} 0\nNa Cl\n1 1\nDirect\n"
          "0 0 0\n0.5 0.5 0.5\n")
EXTXYZ = (f'2\nLattice="0 {A} {A} {A} 0 {A} {A} {A} 0" Properties=species:S:1:pos:R:3 pbc="T T T"\n'
          f"Na 0 0 0\nCl {A} {A} {A}\n")


def _read(name):
    with open(os.path.join(STRUCTURES, name), encoding="utf-8") as handle:
        return handle.read()


BASES = {
    "cif": [_read("rocksalt-NaCl.cif"), _read("perovskite-SrTiO3.cif")],
    "poscar": [POSCAR],
    "xyz": [EXTXYZ],
}
FILE_NAMES = {"cif": "case.cif", "poscar": "POSCAR", "xyz": "case.extxyz"}

EXTREMES = ["1e30", "1e154", "1e308", "-1e308", "1e-300", "0", "-0", "nan", "NaN", "inf", "-inf", "1e400",
            "1" * 400, "9" * 25, "-5.6402", "1e4", "9999.9", "0.0001", "3e3", "-1", "1e-8", "2147483648"]
INSERTS = ["nan", "inf", "-", "'", '"', "\n", "loop_\n", "_atom_site_label", "?", ".", "Xx", "data_", ";", "#",
           "_cell_length_a 1e308\n", "\x00", "é", "\t", "=", "Lattice=", "1e308 ", "1" * 400, "\n\n\n"]
COUNTS = [10 ** 9, 10 ** 6, 10 ** 18, 0, -1, 3, 1, 10 ** 400]
NUMBER = re.compile(rb"[-+]?\d+\.?\d*(?:[eE][-+]?\d+)?")


def _mutate(rng, data: bytes, kind: str) -> bytes:
    choice = rng.choice(["flip", "truncate", "delete", "duplicate", "number", "number", "number", "insert",
                         "long line", "non-utf8", "count"])
    if not data:
        return data
    i = rng.randrange(len(data))
    if choice == "flip":
        return data[:i] + bytes([rng.randrange(256)]) + data[i + 1:]
    if choice == "truncate":
        return data[:i]
    if choice == "delete":
        return data[:i] + data[i + rng.randint(1, 80):]
    if choice == "duplicate":
        lines = data.split(b"\n")
        k = rng.randrange(len(lines))
        return b"\n".join(lines[:k + 1] + [lines[k]] * rng.randint(1, 3) + lines[k + 1:])
    if choice == "number":
        numbers = list(NUMBER.finditer(data))
        if not numbers:
            return data
        m = rng.choice(numbers)
        return data[:m.start()] + rng.choice(EXTREMES).encode() + data[m.end():]
    if choice == "insert":
        return data[:i] + rng.choice(INSERTS).encode() + data[i:]
    if choice == "long line":
        return data[:i] + (rng.choice(["1", "x", "0.5 ", "#"]) * rng.choice([10 ** 4, 10 ** 5])).encode() + data[i:]
    if choice == "non-utf8":
        return data[:i] + bytes(rng.randrange(128, 256) for _ in range(rng.randint(1, 8))) + data[i:]
    # the atom count the header claims
    count = str(rng.choice(COUNTS)).encode()
    lines = data.split(b"\n")
    if kind == "xyz":
        lines[0] = count
    elif kind == "poscar" and len(lines) > 6:
        lines[6] = count + b" " + count if rng.random() < 0.5 else b"1 " + count
    else:   # CIF: another space group (the operations listed stay), or a cell length as big as a count
        if rng.random() < 0.5:
            group = rng.choice([b"'I a -3 d'", b"'P 1'", b"'F m -3 m'", b"'Q 9'"])
            return re.sub(rb"(_symmetry_space_group_name_H-M|_space_group_name_H-M_alt)\s+'[^']*'",
                          lambda m: m.group(1) + b" " + group, data)
        return data[:i] + b"\n_cell_length_a " + count + b"\n" + data[i:]
    return b"\n".join(lines)


def make_case(rng) -> dict:
    """One corrupted file and the command line to run on it (``{FILE}`` stands for its path)."""
    kind = rng.choice(["cif", "cif", "poscar", "xyz"])
    base = rng.choice(BASES[kind])
    data = base.encode()
    for _ in range(rng.randint(1, 4)):
        data = _mutate(rng, data, kind)
    command = rng.choice(["energy", "energy", "sites", "constant", "charges"])
    argv = [command, "{FILE}"]
    if command == "charges":   # oxidation states assigned (or equilibrated) for the corrupted structure
        return {"kind": kind, "name": FILE_NAMES[kind], "data": data,
                "argv": argv + rng.choice([[], [], ["--method", "equilibrate"], ["--ignore-file-states"]])}
    if kind != "cif" or rng.random() < 0.2:
        na, cl = rng.choice([("1", "-1"), ("1", "-1"), ("1e308", "-1e308"), ("1e4", "-1e4"), ("nan", "1"),
                             ("1" * 400, "-1"), ("2", "-1")])
        if "SrTiO3" in base:
            argv += ["--charge", f"Sr={na}", "--charge", "Ti=4", "--charge", f"O={cl}"]
        else:
            argv += ["--charge", f"Na={na}", "--charge", f"Cl={cl}"]
    if rng.random() < 0.3:
        argv += ["--tol", rng.choice(["1e-6", "1e-12", "1e-15", "1e-20", "0.5", "0", "nan"])]
    if rng.random() < 0.3:
        argv += ["--method", rng.choice(["direct", "mesh"])]
    if rng.random() < 0.3:
        argv += ["--max-atoms", rng.choice(["10", "1", "1000000"])]
    if rng.random() < 0.15:
        argv += ["--min-distance", rng.choice(["0", "3", "1e308"])]
    if rng.random() < 0.15:
        argv += ["--cell", "primitive"]
    return {"kind": kind, "name": FILE_NAMES[kind], "data": data, "argv": argv}


def run_in_process(case, folder):
    """Write the case's file into ``folder`` and run the command in this process: ``(code, out, err)``."""
    path = os.path.join(folder, case["name"])
    with open(path, "wb") as handle:
        handle.write(case["data"])
    return run_command([path if a == "{FILE}" else a for a in case["argv"]])


def run_command(argv):
    """``madelung ARGV`` in this process: ``(exit code, stdout, stderr)``."""
    from madelung.cli import main

    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        try:
            code = main(argv)
        except SystemExit as exc:   # argparse usage errors
            code = exc.code
    return code, out.getvalue(), err.getvalue()


NON_FINITE = re.compile(r"(?<![\w./])[-+]?(?:nan|inf|NaN|Infinity)(?![\w./-])")


def classify(code, out, err) -> str:
    """``result``, ``clean error`` (both fine) or what went wrong."""
    errors = [line for line in err.strip().splitlines() if "warning:" not in line]
    if "Traceback" in err:
        return "traceback"
    if code == 0:
        return "NaN printed" if NON_FINITE.search(out) else "result"
    if code == 2:
        return "clean error" if len(errors) == 1 else "exit 2 without one line"
    if code == 1:
        return "internal error"
    return f"exit {code}"


# ---------------------------------------------------------------- the large corpus
def _worker(connection, folder):
    import warnings

    warnings.simplefilter("ignore")
    while True:
        case = connection.recv()
        if case is None:
            return
        try:
            code, out, err = run_in_process(case, folder)
            outcome = classify(code, out, err)
            connection.send((outcome, (err.strip().splitlines() or [""])[-1][:300]))
        except BaseException as exc:   # noqa: BLE001 - anything escaping main is an outcome too
            connection.send(("escaped main", f"{type(exc).__name__}: {exc}"[:300]))


def run_corpus(cases, workers=2, seconds=30.0, seed=0, report=sys.stdout):
    """Run ``cases`` random cases; return ``{outcome: count}`` and examples of the bad ones."""
    import multiprocessing
    import tempfile

    context = multiprocessing.get_context("fork")
    rng = random.Random(seed)
    todo = [make_case(rng) for _ in range(cases)]
    counts, examples = {}, {}
    root = tempfile.mkdtemp(prefix="madelung-fuzz-")
    slots = []

    def start(k):
        folder = os.path.join(root, f"w{k}")
        os.makedirs(folder, exist_ok=True)
        parent, child = context.Pipe()
        process = context.Process(target=_worker, args=(child, folder), daemon=True)
        process.start()
        return {"process": process, "pipe": parent, "case": None, "since": 0.0, "k": k}

    slots = [start(k) for k in range(workers)]
    next_case = 0
    done = 0
    started = time.time()
    while done < len(todo):
        for slot in slots:
            if slot["case"] is None and next_case < len(todo):
                slot["case"], slot["since"] = todo[next_case], time.time()
                slot["pipe"].send(todo[next_case])
                next_case += 1
        for i, slot in enumerate(slots):
            if slot["case"] is None:
                continue
            outcome = None
            if slot["pipe"].poll(0.01):
                try:
                    outcome, line = slot["pipe"].recv()
                except EOFError:
                    outcome, line = None, ""
            if outcome is None and not slot["process"].is_alive():
                outcome, line = f"crash (exit {slot['process'].exitcode})", ""
            elif outcome is None and time.time() - slot["since"] > seconds:
                slot["process"].kill()
                slot["process"].join()
                outcome, line = "hang (killed)", ""
            if outcome is None:
                continue
            counts[outcome] = counts.get(outcome, 0) + 1
            if outcome not in ("result", "clean error"):
                examples.setdefault(outcome, []).append((slot["case"]["argv"], slot["case"]["data"][:300], line))
            done += 1
            case = slot["case"]
            slot["case"] = None
            if not slot["process"].is_alive():
                slots[i] = start(slot["k"])
            if done % 250 == 0:
                print(f"{done}/{len(todo)} cases, {time.time() - started:.0f} s: {counts}", file=report, flush=True)
            del case
    for slot in slots:
        if slot["process"].is_alive():
            slot["pipe"].send(None)
            slot["process"].join(5)
    return counts, examples


def main(argv=None):
    parser = argparse.ArgumentParser(description="run a large fuzz corpus and print the outcome counts")
    parser.add_argument("--cases", type=int, default=4000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--seconds", type=float, default=30.0, help="time limit per case")
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args(argv)
    started = time.time()
    counts, examples = run_corpus(args.cases, args.workers, args.seconds, args.seed)
    print(f"\n{args.cases} cases, seed {args.seed}, limit {args.seconds:g} s per case, "
          f"{time.time() - started:.0f} s in all")
    print(f"{'outcome':<28} {'cases':>7}")
    for outcome, count in sorted(counts.items(), key=lambda kv: -kv[1]):
        print(f"{outcome:<28} {count:>7}")
    for outcome, found in examples.items():
        print(f"\n{outcome}: first examples")
        for argv, data, line in found[:5]:
            print(f"  {' '.join(argv)}\n    {data[:160]!r}\n    {line}")
    return 0 if set(counts) <= {"result", "clean error"} else 1


if __name__ == "__main__":
    sys.exit(main())
