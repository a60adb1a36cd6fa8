"""Fuzzing: corrupted CIF, POSCAR and extended-XYZ files, extreme numbers and huge claimed sizes
(made by tests/fuzz_corpus.py) through the loader and the commands. Every case ends, within a
time limit, in a result (exit 0, no NaN or infinity printed) or in one clean line with exit
code 2 -- never a hang, a crash, a traceback or an internal error.

Most cases run in this process for speed (a timer signal catches a hang of the Python code);
a few run as subprocesses with a timeout, which also catches hangs inside compiled code and
segmentation faults. The large corpus (thousands of cases) is run by
``python tests/fuzz_corpus.py`` (see its docstring).
"""

import os
import random
import signal
import subprocess
import sys

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from conftest import ROOT
from fuzz_corpus import classify, make_case, run_in_process

SECONDS = 30     # per case: far above what any case needs; only a hang reaches it


class Hang(BaseException):
    """Raised by the timer; a BaseException, so the command line's error handling lets it through."""


def _alarm(signum, frame):
    raise Hang()


def run_with_limit(case, folder):
    previous = signal.signal(signal.SIGALRM, _alarm)
    signal.setitimer(signal.ITIMER_REAL, SECONDS)
    try:
        return run_in_process(case, folder)
    except Hang:
        pytest.fail(f"hang: {case['argv']} on {case['data'][:200]!r}")
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, previous)


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture,
                                                                  HealthCheck.too_slow])
@given(rng=st.randoms(use_true_random=False))
def test_corrupted_files_end_in_a_result_or_one_clean_line(tmp_path, rng):
    case = make_case(rng)
    code, out, err = run_with_limit(case, str(tmp_path))
    outcome = classify(code, out, err)
    assert outcome in ("result", "clean error"), (outcome, case["argv"], case["data"][:300], err[-500:])


def test_the_generator_covers_every_format_and_mutation_kind():
    rng = random.Random(0)
    cases = [make_case(rng) for _ in range(300)]
    assert {c["kind"] for c in cases} == {"cif", "poscar", "xyz"}
    assert any(b"1e308" in c["data"] for c in cases)
    assert any(len(c["data"]) > 10 ** 4 for c in cases)                  # very long lines
    assert any(b"1000000000" in c["data"].split(b"\n")[0] for c in cases)  # huge claimed atom counts
    with pytest.raises(UnicodeDecodeError):
        for c in cases:
            c["data"].decode("utf-8")                                     # some are not UTF-8


A = 2.8201
HOSTILE = {
    # the header claims a billion atoms of a three-line file (a reader trusting it loops for minutes)
    "claims.extxyz": "1000000000\nLattice=\"5 0 0 0 5 0 0 0 5\" Properties=species:S:1:pos:R:3\nNa 0 0 0\n",
    # a cell of 1e308 Å (segfaults and hangs in the planning of images before the bounds)
    "POSCAR": f"NaCl\n1.0\n0 1e308 {A}\n{A} 0 {A}\n{A} {A} 0\nNa Cl\n1 1\nDirect\n0 0 0\n0.5 0.5 0.5\n",
    # a valid crystal in a basis so skewed that a neighbour search visits millions of images
    "skewed.vasp": f"NaCl\n1.0\n0 9999.9 {A}\n{A} 0 1e-300\n{A} {A} 0\nNa Cl\n1 1\nDirect\n0 0 0\n0.5 0.5 0.5\n",
    # a property claiming a billion columns
    "columns.extxyz": "2\nLattice=\"5 0 0 0 5 0 0 0 5\" Properties=species:S:1:pos:R:999999999\nNa 0 0 0\nCl 2 2 2\n",
}


@pytest.mark.parametrize("name", sorted(HOSTILE))
def test_hostile_files_in_a_separate_process_end_cleanly(tmp_path, name):
    path = tmp_path / name
    path.write_text(HOSTILE[name])
    env = dict(os.environ, PYTHONPATH=ROOT)
    try:
        done = subprocess.run([sys.executable, "-m", "madelung.cli", "energy", str(path), "--charge", "Na=1",
                               "--charge", "Cl=-1", "--max-atoms", "10"], capture_output=True, text=True,
                              env=env, timeout=120)
    except subprocess.TimeoutExpired:
        pytest.fail(f"{name}: hang (killed after 120 s)")
    assert done.returncode >= 0, f"{name}: killed by signal {-done.returncode}"
    assert classify(done.returncode, done.stdout, done.stderr) == "clean error", done.stderr
    assert str(path) in done.stderr
