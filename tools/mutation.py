"""Mutation testing of tracelab: mutmut (PyPI) over the Python layers, plus the SQL probe.

Each target runs in its own scratch copy of the repository (``--work``, default
/tmp/tracelab-mutation/<target>) with a [tool.mutmut] section naming the code to mutate and
the test files that should catch it, so runs stay scoped and nothing is written into the
checkout. ``make mutation`` runs every target; ``--target physics`` runs one. The SQL probe
(tools/mutate_sql.py) plants mutations in tracelab/analyses/sql/*.sql the same way.

Scores: killed / (killed + survived + timeout); "no tests" mutants (code no selected test
runs) are counted as survivors too. docs/testing.md records the figures and the survivors.
"""

from __future__ import annotations

import argparse
import random
import re
import shutil
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
TARGETS: dict[str, tuple[str, list[str]]] = {
    "physics": ("tracelab/physics/", [
        "tests/physics", "tests/oracles/test_frame_oracle.py",
        "tests/oracles/test_counter_boundaries.py",
    ]),
    "analyses": ("tracelab/analyses/", [
        "tests/analyses/test_load.py", "tests/analyses/test_load_bitrates.py",
        "tests/analyses/test_timing.py", "tests/analyses/test_envelopes.py",
        "tests/analyses/test_jobs.py", "tests/analyses/test_signals.py",
        "tests/oracles/test_load_oracle.py", "tests/analyses/test_compare.py",
        "tests/analyses/test_counter_envelopes.py", "tests/analyses/test_signals_report.py",
        "tests/fleet/test_regressions.py", "tests/analyses/test_scale_timing.py",
    ]),
    "forensics": ("tracelab/forensics/", [
        "tests/forensics/test_replay.py", "tests/forensics/test_verdict.py",
        "tests/forensics/test_truth.py", "tests/forensics/test_bitrates.py",
        "tests/forensics/test_framestore.py", "tests/forensics/test_scoring.py",
        "tests/forensics/test_every_change.py", "tests/oracles/test_counter_boundaries.py",
    ]),
}


MUTATION_EXAMPLES = 10


def _scratch(target: str, work: Path) -> Path:
    source, tests = TARGETS[target]
    if work.exists():
        shutil.rmtree(work)
    work.mkdir(parents=True)
    for name in ("tracelab", "tests", "demo_logs", "README.md", "DEVELOPERS.md", "docs"):
        src = ROOT / name
        if src.is_dir():
            shutil.copytree(src, work / name, ignore=shutil.ignore_patterns("__pycache__"))
        elif src.exists():
            shutil.copy2(src, work / name)
    tests = [t for t in tests if (ROOT / t).exists()]
    # Under mutation every hypothesis test runs at most MUTATION_EXAMPLES examples: a mutant
    # is run hundreds of times, and most are killed by the hand-worked cases anyway.
    for path in (work / "tests").rglob("*.py"):
        text = path.read_text()
        new = re.sub(r"max_examples=(\d+)",
                     lambda m: f"max_examples={min(int(m.group(1)), MUTATION_EXAMPLES)}", text)
        if new != text:
            path.write_text(new)
    pyproject = (ROOT / "pyproject.toml").read_text()
    pyproject += (
        "\n[tool.mutmut]\n"
        "source_paths = ['tracelab/']\n"
        f"only_mutate = ['{source}*']\n"
        f"pytest_add_cli_args_test_selection = {tests!r}\n"
        "pytest_add_cli_args = ['-x', '-q', '-p', 'no:cacheprovider']\n"
        # polars / DuckDB start thread pools: a child forked from a process that ran the
        # tests can hang, so mutants are forked from a clean fork server
        "process_isolation = 'forkserver'\n"
        "also_copy = ['demo_logs', 'README.md', 'DEVELOPERS.md', 'docs']\n"
    )
    (work / "pyproject.toml").write_text(pyproject)
    return work


def _status(work: Path) -> dict[str, str]:
    bindir = Path(sys.executable).parent
    out = subprocess.run([str(bindir / "mutmut"), "results", "--all", "true"], cwd=work,
                         check=True, capture_output=True, text=True).stdout
    status: dict[str, str] = {}
    for line in out.splitlines():
        m = re.match(r"\s*(\S+): (.+)$", line)
        if m:
            status[m.group(1)] = m.group(2).strip()
    return status


#: a few mutants per target (fnmatch patterns, as mutmut takes them), tested first to make
#: mutmut generate all mutants and collect its test statistics before a sample is drawn
PROBE = {"physics": "tracelab.physics.confinement.x_recovery_bits__mutmut_1",
         "analyses": "tracelab.analyses.load.x_*__mutmut_1",
         "forensics": "tracelab.forensics.replay.x_*__mutmut_1"}


#: appended to the scratch copy's tests/conftest.py: no shrinking (a mutant that fails a
#: property test would otherwise spend its CPU budget minimising the example), no database
HYPOTHESIS_PROFILE = """
# --- added by tools/mutation.py for mutation runs only ---
from hypothesis import Phase as _Phase
from hypothesis import settings as _settings

_settings.register_profile("tracelab-mutation", max_examples=10, database=None,
                           phases=[_Phase.explicit, _Phase.reuse, _Phase.generate])
_settings.load_profile("tracelab-mutation")
"""


def _install_profile(work: Path) -> None:
    pyproject = work / "pyproject.toml"
    text = pyproject.read_text()
    if "process_isolation" not in text:
        pyproject.write_text(text.replace("[tool.mutmut]\n",
                                          "[tool.mutmut]\nprocess_isolation = 'forkserver'\n"))
    conftest = work / "tests" / "conftest.py"
    text = conftest.read_text() if conftest.exists() else ""
    if "tracelab-mutation" not in text:
        conftest.write_text(text + HYPOTHESIS_PROFILE)


def run_target(target: str, work: Path, children: int, sample: int = 0, seed: int = 17,
               reuse: bool = False) -> dict[str, object]:
    """Run mutmut on one target; with ``sample`` > 0 only a seeded random sample of that many
    mutants (all are generated; the score is then an estimate). ``reuse`` keeps an earlier
    scratch copy and its results (mutmut skips mutants it has already tested)."""
    bindir = Path(sys.executable).parent
    if not (reuse and (work / "mutants").exists()):
        work = _scratch(target, work)
    _install_profile(work)
    t0 = time.monotonic()
    mutmut = [str(bindir / "mutmut"), "run", "--max-children", str(children)]
    names: list[str] = []
    if sample:
        if not (work / "mutants" / "mutmut-stats.json").exists():
            subprocess.run([*mutmut, PROBE[target]], cwd=work, check=False,
                           stdout=subprocess.DEVNULL)
        every = sorted(_status(work))
        names = sorted(random.Random(seed).sample(every, min(sample, len(every))))
    for a in range(0, max(len(names), 1), 200):  # keep the command line short
        subprocess.run([*mutmut, *names[a:a + 200]], cwd=work, check=False,
                       stdout=subprocess.DEVNULL)
    elapsed = time.monotonic() - t0
    status = _status(work)
    if names:
        status = {k: v for k, v in status.items() if k in set(names)}
    counts = Counter(status.values())
    if counts and set(counts) == {"not checked"}:
        # mutmut stops before any mutant when its clean run of the tests fails (a test that
        # failed once under load, say); the output went to /dev/null
        print(f"{target}: mutmut tested nothing (its clean test run failed?); run again with "
              f"--reuse, or `cd {work} && mutmut run NAME` to see why", file=sys.stderr)
    killed = counts.get("killed", 0)
    total = sum(n for s, n in counts.items() if s not in ("skipped", "not checked"))
    survivors = sorted(k for k, s in status.items() if s not in ("killed", "skipped"))
    return {"target": target, "counts": dict(counts), "killed": killed, "total": total,
            "score": killed / total if total else float("nan"), "seconds": round(elapsed),
            "survivors": survivors, "work": str(work)}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--target", choices=[*TARGETS, "sql", "all"], default="all")
    ap.add_argument("--work", type=Path, default=Path("/tmp/tracelab-mutation"))
    ap.add_argument("--children", type=int, default=2)
    ap.add_argument("--reuse", action="store_true", help="keep the scratch copy and results")
    ap.add_argument("--sample", type=int, default=0,
                    help="test only a seeded random sample of this many mutants per target")
    args = ap.parse_args(argv)
    names = list(TARGETS) + ["sql"] if args.target == "all" else [args.target]
    for name in names:
        if name == "sql":
            from tools import mutate_sql

            mutate_sql.main([])
            continue
        r = run_target(name, args.work / name, args.children, args.sample,
                       reuse=args.reuse)
        print(f"{name}: {r['killed']}/{r['total']} killed ({100 * float(r['score']):.1f} %) "
              f"in {r['seconds']} s; {r['counts']}")
        listing = args.work / f"{name}-survivors.txt"
        listing.write_text("".join(f"{s}\n" for s in r["survivors"]))
        print(f"  {len(r['survivors'])} survivors listed in {listing}")
        print(f"  details: cd {r['work']} && {Path(sys.executable).parent}/mutmut show NAME")
    return 0


if __name__ == "__main__":
    sys.exit(main())
