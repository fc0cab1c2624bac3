"""Fuzzing the readers and the command line with mutated demo files and hostile option values.

Property (qhl's bad-input convention, common practice): every case ends in a result or in a
QhlInputError (CLI: exit status 2 with a one-line `qhl: error: ...`); never another exception,
never a memory error, never a hang (a time limit per case).

Inputs: a mutation corpus built from the shipped demo files (qhl/data/demo_cluster.toml, a
3-spin cut of it so that nothing computes for long, qhl/data/demo_structure.pdb and its mmCIF
and XYZ renderings, and a CSV written by qhl.learning.data_csv.write_signals_csv). A case applies
1-3 mutations: a number or value replaced by a hostile one (huge, tiny, NaN, bool, string,
integers beyond a float, a date), a line deleted, duplicated or truncated, bytes that are not
UTF-8, deep nesting, a long field, a swapped key. Hypothesis draws the mutations in the default
run (a few hundred cases); the slow run draws 10,000 cases from a seeded generator and reports
the outcome counts per reader.
"""

from contextlib import contextmanager, redirect_stderr, redirect_stdout
from dataclasses import replace
import io
from pathlib import Path
import random
import re
import resource
import shutil
import signal

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from qhl import QhlInputError, demo_cluster, load_cluster
from qhl.cli import main
from qhl.exact.likelihood import Dataset
from qhl.learning.data_csv import load_signals_csv, write_signals_csv
from qhl.survey.structure import cluster_to_toml, demo_structure_path, read_structure

DATA = Path(__file__).parents[1] / "qhl" / "data"

# ------------------------------------------------------------------ the corpus
HOSTILE_VALUES = [
    "0", "-1", "-0.0", "1", "2", "3", "0.5", "1e308", "-1e308", "1e-320", "inf", "-inf", "nan",
    "18446744073709551616", "9" * 400, "1e9", "1.5e9", "1048577", "9223372036854775807",
    "1e30", "true", "false", '"x"', '""', '"1H"', '"13C"', '"2H"', "[]", "{}", "[0, 0, 0]",
    "[0, 0, 1e160]", "[1, [2]]", "1979-05-27", "1979-05-27T07:32:00Z", '{"1H" = 1.0}', "-13.5", "1e-5",
    # extreme but valid: these reach the computations
    "1e8", "-1e9", "999", "1000", "100", "10", "-10", "1e-9", "1e-15", "4096", "0.0001",
]
HOSTILE_OPTIONS = ["-1", "0", "1e20", "1e-320", "1e300", "nan", "inf", "-inf", "abc", "", "1e11", "3", "0.5",
                   "2", "9" * 400, "1e-5:1e-4:100000000", "1:2:3", "--json", "1e-3", "100", "1e9", "-0"]
OPS = ("value", "value", "value", "delete", "duplicate", "truncate", "bytes", "nest", "long", "swap", "flip")
_NUMBER = re.compile(rb"(?<![A-Za-z_])[-+]?(?:\d+\.?\d*(?:[eE][-+]?\d+)?|inf|nan)")


def small_cluster():
    """Three spins of the demo cluster, two experiments of 24 points (fast to compute)."""
    c = demo_cluster()
    keep = {"H1", "H2", "H3"}
    return replace(c, spins=tuple(s for s in c.spins if s.label in keep),
                   pairs=tuple(p for p in c.pairs if set(p.spins) <= keep),
                   experiments=tuple(replace(e, points=24) for e in c.experiments[:2]), name="fuzz-seed")


def _structure_seeds():
    import gemmi

    pdb = demo_structure_path().read_bytes()
    st_ = gemmi.read_structure(str(demo_structure_path()))
    cif = st_.make_mmcif_document().as_string().encode()
    atoms = [(a.element.name, a.pos) for ch in st_[0] for r in ch for a in r]
    xyz = (f"{len(atoms)}\ndemo\n" + "".join(f"{e} {p.x:.3f} {p.y:.3f} {p.z:.3f}\n" for e, p in atoms)).encode()
    return {".pdb": pdb, ".cif": cif, ".xyz": xyz}


class Corpus:
    """The seed files, written once into a folder."""

    def __init__(self, folder: Path):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self.cluster = small_cluster()
        self.toml_seeds = [cluster_to_toml(self.cluster).encode(), (DATA / "demo_cluster.toml").read_bytes()]
        from qhl.exact.signals import compute_signals
        rep = compute_signals(self.cluster, free=["offset:*"], gradient=False)
        ds = Dataset({ex.name: (ex.times_s, rep.signals[ex.name], 1e-3) for ex in self.cluster.experiments})
        write_signals_csv(folder / "seed.csv", ds)
        self.csv_seed = (folder / "seed.csv").read_bytes()
        self.structure_seeds = _structure_seeds()
        (folder / "small.toml").write_bytes(self.toml_seeds[0])


def mutate(data: bytes, ops) -> bytes:
    """Apply mutations (op, position, value index) to `data`; positions wrap around."""
    for op, pos, k in ops:
        value = HOSTILE_VALUES[k % len(HOSTILE_VALUES)].encode()
        lines = data.split(b"\n")
        i = pos % max(len(lines), 1)
        if op == "value":
            nums = list(_NUMBER.finditer(data))
            strings = list(re.finditer(rb'"[^"\n]*"', data))
            spots = nums + strings
            if spots:
                m = spots[pos % len(spots)]
                data = data[:m.start()] + value + data[m.end():]
        elif op == "delete":
            del lines[i]
            data = b"\n".join(lines)
        elif op == "duplicate":
            block = lines[i:i + 1 + k % 8]
            data = b"\n".join(lines[:i] + block * (1 + k % 3) + lines[i:])
        elif op == "truncate":
            data = data[:pos % (len(data) + 1)]
        elif op == "bytes":
            j = pos % (len(data) + 1)
            data = data[:j] + bytes([0x80 + k % 128, k % 256, 0xff]) + data[j:]
        elif op == "nest":
            depth = 10 + (pos % 5000)
            data += b"\nnested = " + b"[" * depth + b"]" * depth + b"\n"
        elif op == "long":
            j = pos % (len(data) + 1)
            data = data[:j] + b"9" * (1000 + pos % 200000) + data[j:]
        elif op == "swap":
            keys = re.findall(rb"^(\w+) =", data, flags=re.M)
            if keys:
                a, b = keys[pos % len(keys)], keys[k % len(keys)]
                data = data.replace(a + b" =", b + b" =", 1)
        elif op == "flip":
            if data:
                j = pos % len(data)
                data = data[:j] + bytes([data[j] ^ (1 << (k % 8))]) + data[j + 1:]
    return data


# ------------------------------------------------------------------ running one case
class _Hang(BaseException):
    """Raised by the per-case alarm (a BaseException, so no `except Exception` swallows it)."""


@contextmanager
def _time_limit(seconds: float):
    def fire(signum, frame):
        raise _Hang()
    old = signal.signal(signal.SIGALRM, fire)
    signal.setitimer(signal.ITIMER_REAL, seconds)
    try:
        yield
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, old)


@contextmanager
def memory_guard(extra_bytes: int = 3 * 2**30):
    """Cap this process's address space at its current size + `extra_bytes` (a memory error, not the OOM killer)."""
    try:
        with open("/proc/self/status") as f:
            vm = next(int(line.split()[1]) * 1024 for line in f if line.startswith("VmSize:"))
    except (OSError, StopIteration):          # not Linux: no cap
        yield
        return
    soft, hard = resource.getrlimit(resource.RLIMIT_AS)
    limit = vm + extra_bytes
    if hard != resource.RLIM_INFINITY:
        limit = min(limit, hard)
    resource.setrlimit(resource.RLIMIT_AS, (limit, hard))
    try:
        yield
    finally:
        resource.setrlimit(resource.RLIMIT_AS, (soft, hard))


def outcome(fn, seconds: float) -> str:
    """'ok', 'refused', 'hang', 'memory' or 'traceback:<type>: <message>' for one call."""
    try:
        with _time_limit(seconds):
            fn()
        return "ok"
    except QhlInputError as e:
        msg = str(e)
        return "refused" if msg and "\n" not in msg else f"traceback:multi-line QhlInputError: {msg[:80]!r}"
    except _Hang:
        return "hang"
    except MemoryError:
        return "memory"
    except Exception as e:          # noqa: BLE001 - counting what escapes is the point
        return f"traceback:{type(e).__name__}: {str(e)[:100]}"


def cli_outcome(argv, seconds: float) -> str:
    """Run `qhl argv` in-process with captured output; classify the exit."""
    out, err = io.StringIO(), io.StringIO()
    try:
        with _time_limit(seconds), redirect_stdout(out), redirect_stderr(err):
            try:
                rc = main(argv)
            except SystemExit as e:          # argparse's usage errors
                rc = e.code
    except _Hang:
        return "hang"
    except MemoryError:
        return "memory"
    except Exception as e:          # noqa: BLE001
        return f"traceback:{type(e).__name__}: {str(e)[:100]}"
    text = err.getvalue()
    if rc in (0, None):
        return "ok"
    last = text.rstrip("\n").split("\n")[-1]
    if rc == 2 and last.startswith("qhl: error: ") and "Traceback" not in text:
        return "refused"
    return f"exit:{rc}: {last[:100]}"


# ------------------------------------------------------------------ the readers and the CLI sample
def case_cluster(corpus: Corpus, rnd: random.Random, ops) -> str:
    seed = corpus.toml_seeds[rnd.randrange(len(corpus.toml_seeds))]
    suffix = ".xyz" if rnd.random() < 0.1 else ".toml"
    data = mutate(corpus.structure_seeds[".xyz"] if suffix == ".xyz" else seed, ops)
    p = corpus.folder / f"case{suffix}"
    p.write_bytes(data)
    return outcome(lambda: load_cluster(p), 5)


def case_csv(corpus: Corpus, rnd: random.Random, ops) -> str:
    p = corpus.folder / "case.csv"
    p.write_bytes(mutate(corpus.csv_seed, ops))
    sigma = rnd.choice([None, None, 1e-3, 0.0, float("nan"), 1e-320])
    return outcome(lambda: load_signals_csv(p, corpus.cluster, sigma=sigma), 5)


def case_structure(corpus: Corpus, rnd: random.Random, ops) -> str:
    suffix = rnd.choice(sorted(corpus.structure_seeds))
    p = corpus.folder / f"case{suffix}"
    p.write_bytes(mutate(corpus.structure_seeds[suffix], ops))
    isotopes = rnd.choice([("1H",), ("1H", "13C"), ("19F",), ("13C", "1H")])
    return outcome(lambda: read_structure(p, isotopes), 10)


def _option(rnd, name):
    return [name, rnd.choice(HOSTILE_OPTIONS)]


def case_cli(corpus: Corpus, rnd: random.Random, ops) -> str:
    folder = corpus.folder
    cluster = folder / "cli.toml"
    cluster.write_bytes(mutate(corpus.toml_seeds[0], ops) if rnd.random() < 0.7 else corpus.toml_seeds[0])
    csv_path = folder / "cli.csv"
    csv_path.write_bytes(mutate(corpus.csv_seed, ops) if rnd.random() < 0.5 else corpus.csv_seed)
    command = rnd.choice(["signal", "signal", "fisher", "fisher", "learn", "budget", "cut", "cut"])
    abuse = rnd.random() < 0.4
    if command == "signal":
        argv = ["signal", str(cluster)] + (["--gradient"] if rnd.random() < 0.5 else [])
        if abuse:
            argv += ["--free", rnd.choice(["offset:*", "nothing", "dipolar:H1-H2", "*"])]
    elif command == "fisher":
        argv = ["fisher", str(cluster)] + (_option(rnd, "--noise") if abuse else [])
    elif command == "learn":
        argv = ["learn", str(cluster), "--data", str(csv_path), "--max-iter", "3", "--free", "offset:*"]
        if abuse:
            argv += _option(rnd, rnd.choice(["--seed", "--noise", "--start-offset", "--shots"]))
    elif command == "budget":
        argv = ["budget", str(cluster), "--free", "offset:*"]
        if abuse:
            argv += _option(rnd, rnd.choice(["--time", "--precision", "--iterations", "--physical-error",
                                             "--sweep-time"]))
    else:
        suffix = rnd.choice(sorted(corpus.structure_seeds))
        structure = folder / f"cli{suffix}"
        structure.write_bytes(mutate(corpus.structure_seeds[suffix], ops) if rnd.random() < 0.5
                              else corpus.structure_seeds[suffix])
        out = folder / "cut"
        shutil.rmtree(out, ignore_errors=True)
        argv = ["cut", str(structure), "--size", "3", "--centres", "2", "--out", str(out)]
        if abuse:
            argv += _option(rnd, rnd.choice(["--size", "--centres", "--radius", "--field", "--shift-spread",
                                             "--seed", "--isotope"]))
    return cli_outcome(argv, 30)


READERS = {"cluster": case_cluster, "csv": case_csv, "structure": case_structure, "cli": case_cli}


def random_ops(rnd: random.Random):
    return [(rnd.choice(OPS), rnd.randrange(10**6), rnd.randrange(10**6)) for _ in range(rnd.randint(1, 3))]


def run_corpus(folder: Path, counts: dict, seed: int = 0) -> dict:
    """Run counts[reader] seeded random cases per reader; tally outcomes per reader."""
    corpus = Corpus(folder)
    rnd = random.Random(seed)
    tally = {}
    with memory_guard():
        for reader, n in counts.items():
            t = tally.setdefault(reader, {"cases": 0, "ok": 0, "refused": 0, "hang": 0, "memory": 0,
                                          "traceback": 0, "examples": []})
            for _ in range(n):
                ops = random_ops(rnd)
                result = READERS[reader](corpus, rnd, ops)
                t["cases"] += 1
                kind = result.split(":")[0]
                key = {"ok": "ok", "refused": "refused", "hang": "hang", "memory": "memory"}.get(kind, "traceback")
                t[key] += 1
                if key in ("hang", "memory", "traceback") and len(t["examples"]) < 5:
                    t["examples"].append((result, ops))
    return tally


def _assert_clean(tally):
    bad = {r: (t["traceback"], t["hang"], t["memory"], t["examples"]) for r, t in tally.items()
           if t["traceback"] or t["hang"] or t["memory"]}
    assert not bad, bad


# ------------------------------------------------------------------ tests
OPS_STRATEGY = st.lists(st.tuples(st.sampled_from(OPS), st.integers(0, 10**6), st.integers(0, 10**6)),
                        min_size=1, max_size=3)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    return Corpus(tmp_path_factory.mktemp("fuzz"))


def _property(corpus, reader, ops, seed):
    result = READERS[reader](corpus, random.Random(seed), ops)
    assert result in ("ok", "refused"), (result, ops)


@pytest.mark.parametrize("reader,examples", [("cluster", 150), ("csv", 100), ("structure", 80), ("cli", 40)])
def test_mutated_inputs_give_a_result_or_one_line(corpus, reader, examples):
    @settings(max_examples=examples, deadline=None, derandomize=True, database=None,
              suppress_health_check=list(HealthCheck))
    @given(ops=OPS_STRATEGY, seed=st.integers(0, 2**16))
    def check(ops, seed):
        with memory_guard():
            _property(corpus, reader, ops, seed)
    check()


def test_seed_files_are_accepted(corpus):
    # the unmutated corpus gives results (so refusals above come from the mutations)
    for reader in READERS:
        assert READERS[reader](corpus, random.Random(1), []) == "ok", reader


def test_corpus_run_counts_outcomes(tmp_path):
    tally = run_corpus(tmp_path, {"cluster": 40, "csv": 30, "structure": 20, "cli": 10}, seed=1)
    assert sum(t["cases"] for t in tally.values()) == 100
    assert all(t["refused"] > 0 for t in tally.values())       # the mutations do reach the checks
    _assert_clean(tally)


# 10,000 cases: under 3 minutes on a shared 2-core machine (measured: 105 s and 174 s).
SLOW_COUNTS = {"cluster": 4000, "csv": 2500, "structure": 2000, "cli": 1500}


@pytest.mark.slow
def test_ten_thousand_fuzzed_cases(tmp_path):
    tally = run_corpus(tmp_path, SLOW_COUNTS, seed=2026)
    for reader, t in tally.items():
        print(f"{reader}: {t['cases']} cases, {t['ok']} results, {t['refused']} refusals, "
              f"{t['traceback']} tracebacks, {t['hang']} hangs, {t['memory']} memory errors")
    assert sum(t["cases"] for t in tally.values()) == 10_000
    _assert_clean(tally)


if __name__ == "__main__":      # python tests/test_fuzz.py [cases per reader ...]: print the tally
    import sys
    import tempfile
    import time

    counts = dict(SLOW_COUNTS)
    if len(sys.argv) == 5:
        counts = dict(zip(counts, map(int, sys.argv[1:])))
    start = time.perf_counter()
    tally = run_corpus(Path(tempfile.mkdtemp()), counts, seed=2026)
    for reader, t in tally.items():
        print(reader, {k: v for k, v in t.items() if k != "examples"})
        for ex in t["examples"]:
            print("   ", ex)
    print(f"{time.perf_counter() - start:.0f} s")
