"""Mutation probe for the analyses' SQL (tracelab/analyses/sql/*.sql).

Plants one mutation at a time (comparison operators, integer and decimal constants, +/- 1
window arithmetic, min/max, least/greatest, floor/ceil, DESC/ASC, <> -> =, arg_min/arg_max,
a dropped NOT, IS NULL -> IS NOT NULL) in the code part of one SQL
file (comments are left alone), serves the mutated text through
``tracelab.analyses.sql_text`` and runs the tests that exercise that file, in this process
(``pytest.main`` once per mutant). A mutant is killed when the tests fail (or the SQL no
longer runs). Usage: ``python -m tools.mutate_sql [--only load] [--list]``.
"""

from __future__ import annotations

import argparse
import re
import sys
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
SQL_DIR = ROOT / "tracelab" / "analyses" / "sql"
#: which tests exercise which SQL files (prefix of the file name -> test paths)
TESTS: dict[str, list[str]] = {
    "load": ["tests/analyses/test_load.py", "tests/oracles/test_load_oracle.py",
             "tests/analyses/test_load_bitrates.py"],
    "timing": ["tests/analyses/test_timing.py", "tests/analyses/test_ground_truth.py"],
    "gaps": ["tests/analyses/test_timing.py", "tests/analyses/test_ground_truth.py"],
    "envelope_signal": ["tests/analyses/test_signals_report.py",
                        "tests/analyses/test_envelopes.py"],
    "envelope": ["tests/analyses/test_envelopes.py"],
    "signals": ["tests/analyses/test_signals.py", "tests/analyses/test_signals_report.py"],
    "macros": ["tests/test_query.py", "tests/analyses/test_envelopes.py",
               "tests/analyses/test_timing.py", "tests/test_incident_queries.py"],
}

_SWAPS = [
    (r"<=", "<"), (r">=", ">"), (r"(?<![<>!-])<(?![=>])", "<="), (r"(?<![<>=-])>(?!=)", ">="),
    (r"(?<=\s)=(?=\s)", "<>"), (r"\+ 1\b", "- 1"), (r"- 1\b", "+ 1"),
    (r"\bmin\(", "max("), (r"\bmax\(", "min("), (r"\bleast\(", "greatest("),
    (r"\bgreatest\(", "least("), (r"\bfloor\(", "ceil("), (r"\bDESC\b", "ASC"),
    (r"(?<=\s)<>(?=\s)", "="), (r"\barg_min\(", "arg_max("), (r"\bNOT\s+(?!NULL)", ""),
    (r"\bIS NULL\b", "IS NOT NULL"),
]
_INT = re.compile(r"(?<![\w$.])(\d+)(?![\w.])")
_DEC = re.compile(r"(?<![\w$.])(\d+\.\d+)(?![\w.])")


@dataclass(frozen=True)
class Mutant:
    file: str
    line: int
    column: int
    before: str
    after: str
    text: str

    def label(self) -> str:
        return f"{self.file}:{self.line}:{self.column}: {self.before!r} -> {self.after!r}"


def _code_span(line: str) -> int:
    """Index where a line comment starts (or len)."""
    i = line.find("--")
    return len(line) if i < 0 else i


def mutants_of(path: Path) -> list[Mutant]:
    lines = path.read_text("utf-8").splitlines(keepends=True)
    out: list[Mutant] = []
    for n, line in enumerate(lines):
        code_end = _code_span(line)
        code = line[:code_end]
        candidates: list[tuple[int, int, str]] = []
        for pattern, repl in _SWAPS:
            for m in re.finditer(pattern, code):
                candidates.append((m.start(), m.end(), repl))
        for m in _DEC.finditer(code):
            candidates.append((m.start(), m.end(), str(round(float(m.group(1)) + 0.01, 4))))
        for m in _INT.finditer(code):
            if _DEC.search(code[max(0, m.start() - 5):m.end() + 5]) and "." in code[
                    max(0, m.start() - 1):m.end() + 1]:
                continue
            candidates.append((m.start(), m.end(), str(int(m.group(1)) + 1)))
        for a, b, repl in sorted(set(candidates)):
            new_line = line[:a] + repl + line[b:]
            text = "".join(lines[:n] + [new_line] + lines[n + 1:])
            out.append(Mutant(path.stem, n + 1, a + 1, line[a:b], repl, text))
    return out


def _tests_for(stem: str) -> list[str]:
    for prefix, tests in TESTS.items():
        if stem.startswith(prefix):
            return [t for t in tests if (ROOT / t).exists()]
    return []


def _child(path: str, tests: list[str]) -> int:
    """In a fresh interpreter: serve one mutated SQL file and run the tests once."""
    import pytest
    from hypothesis import Phase, settings

    import tracelab.analyses as analyses

    # no shrinking and no example database: a killed mutant stops at its first failure
    settings.register_profile("tracelab-mutation", max_examples=10, database=None,
                              phases=[Phase.explicit, Phase.reuse, Phase.generate])
    settings.load_profile("tracelab-mutation")
    mutated = Path(path)
    name, text = mutated.stem, mutated.read_text("utf-8")
    original = analyses.sql_text

    def patched(wanted: str) -> str:
        return text if wanted == name else original(wanted)

    analyses.sql_text = patched  # type: ignore[assignment]
    return int(pytest.main([*tests, "-x", "-q", "-p", "no:cacheprovider", "--no-header",
                            "-m", "not slow", "-k", "not cli_load", "--tb=no"]))


def run(mutants: list[Mutant]) -> tuple[list[Mutant], list[Mutant]]:
    """Each mutant in its own interpreter (pytest.main in one process leaks DuckDB threads)."""
    import subprocess
    import tempfile

    killed: list[Mutant] = []
    survived: list[Mutant] = []
    with tempfile.TemporaryDirectory() as tmp:
        for i, mut in enumerate(mutants):
            tests = _tests_for(mut.file)
            if not tests:
                continue
            path = Path(tmp) / f"{mut.file}.sql"
            path.write_text(mut.text, "utf-8")
            code = subprocess.run(
                [sys.executable, "-c", "import sys; from tools.mutate_sql import _child; "
                 "sys.exit(_child(sys.argv[1], sys.argv[2:]))", str(path), *tests],
                cwd=ROOT, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                check=False).returncode
            (survived if code == 0 else killed).append(mut)
            print(f"[{i + 1}/{len(mutants)}] {'SURVIVED' if code == 0 else 'killed'} "
                  f"{mut.label()}", file=sys.stderr, flush=True)
    return killed, survived


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--only", default="", help="SQL file name prefixes, comma-separated, e.g. load,gaps")
    ap.add_argument("--list", action="store_true", help="list the mutants and stop")
    ap.add_argument("--sample", type=int, default=0, help="a seeded random sample of N")
    ap.add_argument("--seed", type=int, default=17)
    ap.add_argument("--skip", type=int, default=0, help="resume after the first N mutants")
    args = ap.parse_args(argv)
    prefixes = tuple(args.only.split(","))
    files = sorted(p for p in SQL_DIR.glob("*.sql") if p.stem.startswith(prefixes))
    mutants = [m for f in files for m in mutants_of(f) if _tests_for(f.stem)]
    if args.list:
        for m in mutants:
            print(m.label())
        print(f"{len(mutants)} mutants")
        return 0
    t0 = time.monotonic()
    mutants = mutants[args.skip:]
    if args.sample:
        import random

        mutants = sorted(random.Random(args.seed).sample(mutants, min(args.sample, len(mutants))),
                         key=lambda m: (m.file, m.line))
    killed, survived = run(mutants)
    total = len(killed) + len(survived)
    print(f"sql: {len(killed)}/{total} killed ({100 * len(killed) / max(total, 1):.1f} %) "
          f"in {time.monotonic() - t0:.0f} s")
    for m in survived:
        print(f"  survived: {m.label()}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
