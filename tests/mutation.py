"""Mutation testing of the engine's core with mutmut 2's mutation engine, one mutant at a time, in place.

Why not `mutmut run`: mutmut 3 rewrites every function into a trampoline, which numba cannot compile; mutmut 2
mutates the source file in place (what numba needs), but its runner has no way to take a reproducible
random sample, and a full run of every mutant costs hours here (each mutant of a numba module recompiles it).
So this script asks mutmut 2 for the list of mutants of a file (`mutmut.list_mutations`), draws a sample with
a fixed seed, writes each mutant into the file with `mutmut.mutate_file`, runs the file's own quick test
selection (TESTS below) with a time limit, and puts the original back (also on Ctrl-C or SIGTERM).

numba's cache does not follow calls between modules: summary_kernel.py's cached functions embed the kernel's
and answers.py's code as it was when they were compiled. Each mutant therefore runs with a fresh cache folder,
copied from one made by the unmutated run, less the mutated module's files and those of the modules that call
into it (DEPENDENTS), so that every compiled function that could contain the mutant is compiled afresh.

Results go to one JSON line per mutant (default mutation-results/<stem>.jsonl); a rerun skips mutants already
there, so a run can be stopped and taken up again. Usage (DEVELOPERS.md, "Mutation testing"):

    nice -n 10 .venv/bin/python tests/mutation.py pooling/answers.py --sample 40 --seed 20261203
    .venv/bin/python tests/mutation.py pooling/answers.py --report          # counts and survivors
    .venv/bin/python tests/mutation.py pooling/answers.py --show 17         # one mutant's diff
"""

from __future__ import annotations

import argparse
import difflib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from mutmut import ALL, Context, list_mutations, mutate_file

ROOT = Path(__file__).resolve().parent.parent
PYTEST = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", "-p", "no:randomly"]

# Each file's quick test selection: the tests that exercise it, about a minute or less on an idle core.
TESTS: dict[str, list[str]] = {
    "pooling/kernel.py": [
        "tests/test_kernel_sums.py",
        "tests/test_kernel_api.py",
        "tests/test_exact_shared.py",
        "tests/test_predictors_kernel.py",
        "tests/test_conditionals.py",
    ],
    "pooling/model.py": [
        "tests/test_kernel_api.py",
        "tests/test_exact_shared.py",
        "tests/test_predictors_io.py",
        "tests/test_predictors_kernel.py",
        "tests/test_conditionals.py",
        "tests/test_model_checks.py",
    ],
    "pooling/posterior.py": [
        "tests/test_posterior_units.py",
        "tests/test_run_summary.py",
        "tests/test_sampler.py",
        "tests/test_exact_shared.py",
    ],
    "pooling/sampler.py": ["tests/test_sampler.py", "tests/test_run_summary.py", "tests/test_kernel_api.py"],
    "pooling/diagnostics.py": ["tests/test_diagnostics.py", "tests/test_run_summary.py"],
    "pooling/answers.py": ["tests/test_report_stats.py", "tests/test_answers_exact.py"],
    "pooling/order.py": ["tests/test_order.py", "tests/test_report_stats.py"],
    "pooling/results.py": [
        "tests/test_order.py",
        "tests/test_predictive_checks.py",
        "tests/test_model_checks.py",
        "tests/test_report_stats.py",
    ],
    "pooling/output.py": ["tests/test_output_write.py"],
}
# modules whose numba functions call into the key's (their cached machine code would hide a mutant)
DEPENDENTS = {"kernel": ["summary_kernel"], "answers": ["summary_kernel"]}


def mutants(path: Path) -> list:
    return list_mutations(Context(filename=str(path), mutation_id=ALL))


def key(m) -> str:
    """A mutant's name: line number (1-based) and its index among the mutations of that line."""
    return f"{m.line_number + 1}.{m.index}"


def diff(path: Path, m) -> str:
    original = path.read_text()
    mutated, _ = __import__("mutmut").mutate(Context(filename=str(path), mutation_id=m, source=original))
    lines = difflib.unified_diff(original.splitlines(), mutated.splitlines(), lineterm="", n=0)
    return "\n".join(x for x in list(lines)[2:] if not x.startswith("@@"))


def _strip_cache(folder: Path, stems: list[str]) -> None:
    for p in folder.rglob("*"):
        if p.is_file() and any(p.name.startswith(s + ".") for s in stems):
            p.unlink()


_running: list[subprocess.Popen] = []


def _pytest(root: Path, tests: list[str], cache: Path, timeout: float) -> tuple[str, float]:
    env = dict(os.environ, NUMBA_CACHE_DIR=str(cache), PYTHONDONTWRITEBYTECODE="1", PYTHONPATH=str(root))
    start = time.monotonic()
    proc = subprocess.Popen(
        PYTEST + tests, cwd=root, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True
    )
    _running.append(proc)
    try:
        rc = proc.wait(timeout=timeout)
    except subprocess.TimeoutExpired:
        os.killpg(proc.pid, signal.SIGKILL)
        proc.wait()
        return "timeout", time.monotonic() - start
    finally:
        _running.remove(proc)
    # pytest's exit codes: 0 all passed, 1 a test failed, 2 interrupted (a collection error: the mutant broke an
    # import); 3-5 internal or usage error or no test collected: the selection, not the mutant, is at fault.
    # Anything else (a crash, a signal) is the mutant's doing.
    status = {0: "survived", 3: "error", 4: "error", 5: "error"}.get(rc, "killed")
    return status, time.monotonic() - start


def workspace(folder: Path) -> Path:
    """A copy of the package and its tests to mutate, so that the working tree stays usable meanwhile."""
    folder.mkdir(parents=True, exist_ok=True)
    for name in ("pooling", "tests", "examples"):
        shutil.rmtree(folder / name, ignore_errors=True)
        shutil.copytree(ROOT / name, folder / name, ignore=shutil.ignore_patterns("__pycache__", "*.bak"))
    for name in ("pyproject.toml", "README.md", "DEVELOPERS.md"):
        shutil.copy2(ROOT / name, folder / name)
    found = subprocess.run(
        [sys.executable, "-c", "import pooling; print(pooling.__file__)"],
        cwd=folder,
        env=dict(os.environ, PYTHONPATH=str(folder)),
        capture_output=True,
        text=True,
    ).stdout
    assert found.startswith(str(folder)), f"pooling would be imported from {found!r}, not from the copy"
    return folder


def _in_lines(m, spans) -> bool:
    line = m.line_number + 1
    return spans is None or any(a <= line <= b for a, b in spans)


def run(root: Path, rel: str, sample: int | None, seed: int, out: Path, deadline: float | None, spans=None) -> None:
    path = root / rel
    tests = TESTS[rel]
    every = mutants(path)
    chosen = [i for i in range(len(every)) if _in_lines(every[i], spans)]
    if sample is not None and sample < len(chosen):
        chosen = sorted(random.Random(f"{seed}:{rel}").sample(chosen, sample))
    done = set()
    if out.exists():
        done = {json.loads(x)["id"] for x in out.read_text().splitlines() if x.strip()}
    # in a random order (same seed), so that a run stopped by --until has still run a random sample
    todo = [i for i in chosen if key(every[i]) not in done]
    random.Random(f"{seed}:{rel}:order").shuffle(todo)
    print(f"{rel}: {len(every)} mutants, {len(chosen)} chosen (seed {seed}), {len(todo)} to run", flush=True)
    if not todo:
        return
    original = path.read_text()
    stems = [path.stem] + DEPENDENTS.get(path.stem, [])
    with tempfile.TemporaryDirectory(prefix="pooling-mutation-") as tmp:
        base = Path(tmp) / "base"
        base.mkdir()
        status, baseline = _pytest(root, tests, base, timeout=1800)
        if status != "survived":
            sys.exit(f"{rel}: the test selection fails on the unmutated code; fix that first")
        timeout = 2.0 * baseline + 60.0
        print(f"  baseline {baseline:.0f} s (compiling included); time limit per mutant {timeout:.0f} s", flush=True)

        def put_back(*_):
            for proc in list(_running):
                os.killpg(proc.pid, signal.SIGKILL)
            path.write_text(original)
            sys.exit("stopped; original source put back")

        signal.signal(signal.SIGTERM, put_back)
        try:
            for n, i in enumerate(todo):
                if deadline is not None and time.time() > deadline:
                    print("  deadline reached; stopping", flush=True)
                    break
                m = every[i]
                text = diff(path, m)
                mutate_file(backup=False, context=Context(filename=str(path), mutation_id=m, source=original))
                cache = Path(tmp) / "m"
                shutil.rmtree(cache, ignore_errors=True)
                shutil.copytree(base, cache)
                _strip_cache(cache, stems)
                try:
                    status, took = _pytest(root, tests, cache, timeout)
                finally:
                    path.write_text(original)
                rec = {
                    "file": rel,
                    "id": key(m),
                    "line": m.line_number + 1,
                    "status": status,
                    "seconds": round(took, 1),
                    "diff": text,
                }
                with out.open("a") as f:
                    f.write(json.dumps(rec) + "\n")
                print(
                    f"  [{n + 1}/{len(todo)}] {rel}:{rec['id']} {status} ({took:.0f} s) {text.splitlines()[-1].strip()}",
                    flush=True,
                )
        except KeyboardInterrupt:
            pass
        finally:
            path.write_text(original)


def check(root: Path, rel: str, name: str, tests: list[str]) -> None:
    """Run `tests` on one mutant (to show that a new test kills it) and on the original source."""
    path = root / rel
    m = next(m for m in mutants(path) if key(m) == name)
    original = path.read_text()
    print(f"{rel}:{name}\n{diff(path, m)}", flush=True)
    plain = root / ".mutation-numba-cache"  # kept between checks in the same workspace: the original compiles once
    status, took = _pytest(root, tests, plain, timeout=3600)
    print(f"  original: tests {'pass' if status == 'survived' else 'FAIL'} ({took:.0f} s)", flush=True)
    with tempfile.TemporaryDirectory(prefix="pooling-mutation-") as tmp:
        cache = Path(tmp) / "mutant"
        shutil.copytree(plain, cache)
        _strip_cache(cache, [path.stem] + DEPENDENTS.get(path.stem, []))
        mutate_file(backup=False, context=Context(filename=str(path), mutation_id=m, source=original))
        try:
            status, took = _pytest(root, tests, cache, timeout=3600)
        finally:
            path.write_text(original)
    print(f"  mutant: {status} ({took:.0f} s)", flush=True)


def report(path: Path, out: Path) -> None:
    rel = str(path.relative_to(ROOT))
    recs = [json.loads(x) for x in out.read_text().splitlines() if x.strip()] if out.exists() else []
    counts = {s: sum(r["status"] == s for r in recs) for s in ("killed", "survived", "timeout", "error")}
    print(f"{rel}: {len(mutants(path))} mutants, {len(recs)} run, " + ", ".join(f"{v} {k}" for k, v in counts.items()))
    for r in recs:
        if r["status"] == "survived":
            print(f"  survived {rel}:{r['line']} ({r['id']})\n" + "\n".join("    " + x for x in r["diff"].splitlines()))


def main(argv=None) -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("files", nargs="+", type=Path)
    p.add_argument("--sample", type=int, help="mutants per file, drawn with --seed (default: every mutant)")
    p.add_argument("--seed", type=int, default=20261203)
    p.add_argument("--until", help="stop starting mutants after this UTC time, HH:MM")
    p.add_argument(
        "--lines", help="only mutants on these lines of each file, e.g. 145-240,300-310: a change's own lines"
    )
    p.add_argument("--results", type=Path, default=ROOT / "mutation-results")
    p.add_argument("--workspace", type=Path, help="mutate a fresh copy of the package and tests in this folder")
    p.add_argument("--report", action="store_true", help="print counts and survivors from the results")
    p.add_argument("--show", help="print the diff of one mutant, by its line.index name")
    p.add_argument("--check", help="run --tests on one mutant (line.index) and on the original")
    p.add_argument("--tests", nargs="+", help="with --check: the tests to run (default: the file's selection)")
    p.add_argument("-k", dest="keyword", help="with --check: pytest's -k expression")
    a = p.parse_args(argv)
    deadline = None
    if a.until:
        h, m = map(int, a.until.split(":"))
        now = time.gmtime()
        deadline = time.time() + ((h * 60 + m) - (now.tm_hour * 60 + now.tm_min)) * 60 - now.tm_sec
    a.results.mkdir(exist_ok=True)
    for f in a.files:
        rel = str(f.resolve().relative_to(ROOT))
        path = ROOT / rel
        out = a.results.resolve() / f"{path.stem}.jsonl"
        if a.show:
            print(diff(path, next(m for m in mutants(path) if key(m) == a.show)))
        elif a.report:
            report(path, out)
        elif a.check:
            check(
                workspace(a.workspace.resolve()) if a.workspace else ROOT,
                rel,
                a.check,
                (a.tests or TESTS[rel]) + (["-k", a.keyword] if a.keyword else []),
            )
        else:
            spans = None
            if a.lines:
                spans = [
                    tuple(int(x) for x in part.split("-")) if "-" in part else (int(part),) * 2
                    for part in a.lines.split(",")
                ]
            run(workspace(a.workspace.resolve()) if a.workspace else ROOT, rel, a.sample, a.seed, out, deadline, spans)


if __name__ == "__main__":
    main()
