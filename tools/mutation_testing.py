"""Mutation testing of the core numerics with mutmut (not in CI, not in the test suite).

    pip install -e ".[test,mutation]"
    nice -n 15 python tools/mutation_testing.py                 # every module below
    nice -n 15 python tools/mutation_testing.py static pressure # some of them
    nice -n 15 python tools/mutation_testing.py block_problems --functions _tensor,_interpolate

For each module of ``MODULES`` the project (``upscale/``, ``tests/``, ``pyproject.toml``)
is copied into a fresh temporary folder, a ``[tool.mutmut]`` section naming that one
module and its own tests is added to the copy's ``pyproject.toml``, and ``mutmut run``
runs there; the working tree is never touched. mutmut writes every mutant of the module
into one copy of the file (each function behind a trampoline that picks the mutant from an
environment variable), runs the selected tests once to learn which tests call which
function, then forks one worker per mutant that runs only those tests (``-x``: the first
failure kills it; a run longer than 5 times its tests' own time counts as killed too:
``TIMEOUT_MULTIPLIER``).

Numba. mutmut does not mutate decorated functions, so the compiled kernels of these
modules (``block_problems._series``, ``block_problems._fill_couplings``,
``partition._copy_boxes``) are never mutants: they are compiled once from the copy (numba
keys its cache on a hash of the source file, and that file stays the same for all the
mutants) and no mutant can hide behind a stale cache, which is why neither
``NUMBA_DISABLE_JIT=1`` (that would run the banded solver in pure Python, hundreds of times
slower) nor a per-mutant cache flush is needed. The kernels are checked on their own:
``tests/core/test_banded.py`` holds the compiled couplings to the formulas of
``core/two_point.py`` and the banded solves to SciPy's SuperLU. The workers are forked from
a process that has already run parallel kernels, which GNU OpenMP refuses; the runs use
numba's ``workqueue`` threading layer instead (``NUMBA_THREADING_LAYER``).

Results: per module the counts of mutants, killed, surviving and equivalent ones, and the
score killed / (mutants - equivalent); every surviving mutant that is not listed in
``tools/mutation_equivalent.toml`` (mutants that cannot change any result, each with the
reason) is printed with its diff. Equivalent mutants are matched on the function and the
changed lines, not on mutmut's numbering, so the list survives edits elsewhere in a module.
The figures quoted in DEVELOPERS.md ("Mutation testing") come from this script.
"""

from __future__ import annotations

import argparse
import json
import os
import random
import re
import shutil
import subprocess
import sys
import tempfile
import time
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
EQUIVALENT_FILE = ROOT / "tools" / "mutation_equivalent.toml"

# Each module against the tests that exercise it (found with grep for its names); mutmut then
# runs, per mutant, only those of them that call the mutated function.
MODULES = {
    "two_point": [
        "tests/core/test_docstring_examples.py",
        "tests/core/test_two_point.py",
        "tests/core/test_banded.py",
        "tests/checks/test_steady.py",
        "tests/core/test_pinch_outs.py",
        "tests/core/test_pinched_columns.py",
    ],
    "static": [
        "tests/core/test_static.py",
        "tests/core/test_docstring_examples.py",
        "tests/core/test_block_problems.py::test_sealed_within_cardwell_parsons_bounds",
        "tests/io/test_bad_input.py::test_api_bad_options_raise_input_error",
    ],
    "partition": [
        "tests/core/test_partition.py",
        "tests/core/test_docstring_examples.py",
        "tests/core/test_static.py",
        "tests/core/test_block_problems.py",
        "tests/scale/test_boxes.py::test_boxes_give_the_in_memory_answer[method=arithmetic]",
        "tests/scale/test_boxes.py::test_boxes_give_the_in_memory_answer[method=flow-border=2]",
        "tests/io/test_bad_input.py::test_api_bad_options_raise_input_error",
    ],
    "block_problems": [
        "tests/core/test_block_problems.py",
        "tests/core/test_banded.py",
        "tests/core/test_extreme.py",
        "tests/core/test_face_problems.py",
        # the pinch-out links, the two-phase copies (clipped solves) and the option errors
        # reach block_problems too (a full run without them left their mutants alive)
        "tests/core/test_pinch_outs.py",
        "tests/core/test_pinched_columns.py",
        "tests/core/test_two_phase.py",
        "tests/io/test_bad_input.py::test_api_bad_options_raise_input_error",
    ],
    "face_problems": [
        "tests/core/test_face_problems.py",
        "tests/core/test_extreme.py",
    ],
    "pressure": [
        "tests/checks/test_steady.py",
        "tests/core/test_pressure.py",
        "tests/core/test_pinch_outs.py",
        "tests/core/test_pinched_columns.py",
    ],
    # the whole-model solve's own CG and multigrid cycle (moved out of pressure.py)
    "conjugate_gradients": [
        "tests/core/test_conjugate_gradients.py",
        "tests/core/test_pressure.py",
        "tests/core/test_transient.py",
        "tests/checks/test_steady.py",
    ],
    "multigrid": [
        "tests/core/test_multigrid.py",
        "tests/core/test_pressure.py",
        "tests/core/test_transient.py",
        "tests/checks/test_steady.py",
    ],
}

PYTEST_ARGS = ["-x", "-q", "-p", "no:cacheprovider", "--hypothesis-seed=0"]
KILLED = {"killed", "timeout", "segfault"}
TIMEOUT_MULTIPLIER = 5   # a mutant running 5 times longer than its tests did unmutated counts as killed


def _copy_project(work: Path) -> None:
    ignore = shutil.ignore_patterns("__pycache__", ".hypothesis", "*.pyc")
    for name in ("upscale", "tests"):
        shutil.copytree(ROOT / name, work / name, ignore=ignore)
    shutil.copy2(ROOT / "pyproject.toml", work / "pyproject.toml")


def _configure(work: Path, module: str, tests: list[str]) -> None:
    missing = [t for t in tests if not (work / t.split("::")[0]).exists()]
    if missing:  # a renamed test file would otherwise leave the module's mutants untested
        raise SystemExit(f"MODULES[{module!r}] names test files that do not exist: {missing}")
    section = "\n".join([
        "", "[tool.mutmut]",
        'source_paths = ["upscale"]',
        f'only_mutate = ["upscale/core/{module}.py"]',
        f"pytest_add_cli_args_test_selection = {json.dumps(tests)}",
        f"pytest_add_cli_args = {json.dumps(PYTEST_ARGS)}",
        f"timeout_multiplier = {TIMEOUT_MULTIPLIER}",
        "use_git_change_detection = false", ""])
    with open(work / "pyproject.toml", "a", encoding="utf-8") as handle:
        handle.write(section)


def _statuses(work: Path, module: str) -> dict[str, str]:
    from mutmut.stats import status_by_exit_code

    meta = json.loads((work / "mutants" / "upscale" / "core" / f"{module}.py.meta").read_text())
    return {name: status_by_exit_code[code] for name, code in meta["exit_code_by_key"].items()}


def _function(name: str, module: str) -> str:
    """'upscale.core.m.xǁClassǁmethod__mutmut_3' -> 'Class.method'; 'x_func__mutmut_1' -> 'func'."""
    local = name.removeprefix(f"upscale.core.{module}.")
    local = re.sub(r"__mutmut_\d+$", "", local)
    if local.startswith("xǁ"):
        return local[2:].replace("ǁ", ".")
    return local.removeprefix("x_")


def _changed(diff: str) -> tuple[str, str]:
    """The removed and added lines of a diff, each joined and stripped of indentation."""
    lines = [line for line in diff.splitlines() if line[:3] not in ("---", "+++")]
    removed = " ".join(line[1:].strip() for line in lines if line.startswith("-"))
    added = " ".join(line[1:].strip() for line in lines if line.startswith("+"))
    return removed, added


def _equivalents(module: str) -> list[dict]:
    if not EQUIVALENT_FILE.exists():
        return []
    entries = tomllib.loads(EQUIVALENT_FILE.read_text(encoding="utf-8")).get("mutant", [])
    return [e for e in entries if e["module"] == module]


def _is_equivalent(entry: dict, function: str, removed: str, added: str) -> bool:
    return entry["function"] == function and entry["removed"] == removed and entry["added"] == added


def _mutmut(work: Path, names: list[str], children: int) -> float:
    """Run mutmut in ``work`` (on ``names`` only, if given); returns the seconds taken."""
    env = dict(os.environ, NUMBA_THREADING_LAYER="workqueue")
    started = time.monotonic()
    with open(work / "mutmut.log", "a", encoding="utf-8") as log:
        subprocess.run([sys.executable, "-m", "mutmut", "run", "--max-children", str(children), *names], cwd=work,
                       env=env, stdout=log, stderr=subprocess.STDOUT, check=False)
    return time.monotonic() - started


def _summarise(work: Path, module: str, seconds: float, retested: list[str] | None = None,
               equivalent_before: set[str] = frozenset(), untested: set[str] = frozenset()) -> dict:
    """The counts, the score and the surviving mutants (with their diffs) of a finished run;
    after a rerun of the mutants ``retested``, the others count as killed by the first run,
    except ``equivalent_before`` (equivalent survivors of that run, not run again) and
    ``untested`` (left out of a sample: reported, and outside the counts and the score)."""
    statuses = _statuses(work, module)
    if retested is not None:
        statuses = {name: status if name in retested else "survived" if name in equivalent_before else
                    "not tested" if name in untested else "killed" for name, status in statuses.items()}
    not_tested = sorted(name for name, status in statuses.items() if status in ("not tested", "not checked"))
    statuses = {name: status for name, status in statuses.items() if name not in not_tested}
    equivalent_entries = _equivalents(module)
    survivors, equivalent_names, used = [], [], set()
    for name, status in sorted(statuses.items()):
        if status in KILLED:
            continue
        show = subprocess.run([sys.executable, "-m", "mutmut", "show", name], cwd=work, capture_output=True,
                              text=True, check=False)
        diff = show.stdout.split("\n", 1)[1] if "\n" in show.stdout else show.stdout
        function = _function(name, module)
        removed, added = _changed(diff)
        match = [i for i, e in enumerate(equivalent_entries) if _is_equivalent(e, function, removed, added)]
        if match:
            equivalent_names.append(name)
            used.update(match)
            continue
        survivors.append({"name": name, "status": status, "function": function, "removed": removed,
                          "added": added, "diff": diff})
    total, equivalent = len(statuses), len(equivalent_names)
    killed = sum(status in KILLED for status in statuses.values())
    relevant = total - equivalent
    unused = [e for i, e in enumerate(equivalent_entries) if i not in used]
    still_open = sorted(name for name, status in statuses.items() if status not in KILLED)
    return {"module": module, "mutants": total, "killed": killed, "equivalent": equivalent, "open": still_open,
            "equivalent_names": equivalent_names, "not_tested": not_tested,
            "survived": len(survivors), "score": killed / relevant if relevant else 1.0, "seconds": round(seconds),
            "survivors": survivors, "unused_equivalents": unused}


def _patterns(module: str, functions: list[str]) -> list[str]:
    """mutmut's name patterns of every mutant of ``functions`` ('func' or 'Class.method')."""
    return [f"upscale.core.{module}." + ("xǁ" + f.replace(".", "ǁ") if "." in f else "x_" + f) + "__mutmut_*"
            for f in functions]


def run_module(module: str, tests: list[str], children: int, keep: bool, rerun: Path | None = None,
               sample: int | None = None, functions: list[str] | None = None) -> dict:
    """Mutate ``module`` in a fresh copy of the project (only the mutants of ``functions``, if
    given; the others are reported as not tested), or, with ``rerun`` (a folder kept by an
    earlier run), copy today's tests there and test again only the mutants that survived it
    (tests only added since: a killed mutant stays killed)."""
    if rerun is None:
        work = Path(tempfile.mkdtemp(prefix=f"mutation-{module}-"))
        _copy_project(work)
        names, equivalent_before, untested = _patterns(module, functions or []), frozenset(), frozenset()
    else:
        work = rerun
        before = json.loads((work / "report.json").read_text())
        equivalent_before = set(before.get("equivalent_names", []))
        names = [n for n in before["open"] if n not in equivalent_before]
        untested = set(before.get("not_tested", []))
        if sample is not None:   # the survivors of the last run, and a seeded sample of the mutants it never ran
            statuses = _statuses(work, module)
            never = sorted(n for n in names if statuses[n] == "not checked")
            chosen = set(random.Random(0).sample(never, min(sample, len(never))))
            untested |= set(never) - chosen
            names = [n for n in names if n not in untested]
        shutil.rmtree(work / "tests")
        shutil.copytree(ROOT / "tests", work / "tests", ignore=shutil.ignore_patterns("__pycache__", ".hypothesis"))
        shutil.copy2(ROOT / "pyproject.toml", work / "pyproject.toml")
        # mutmut only looks up the callees of tests it has not seen: start its map afresh
        (work / "mutants" / "mutmut-stats.json").unlink(missing_ok=True)
    _configure(work, module, tests)
    seconds = _mutmut(work, names, children) if (names or rerun is None) else 0.0
    report = _summarise(work, module, seconds, names if rerun is not None else None, equivalent_before, untested)
    (work / "report.json").write_text(json.dumps(report, indent=1))
    print(f"{module}: {report['mutants']} mutants, {report['killed']} killed, {report['equivalent']} equivalent, "
          f"{report['survived']} surviving, score {100 * report['score']:.1f} % ({seconds:.0f} s; {work})"
          + (f"; {len(report['not_tested'])} more not tested (outside the sample)" if report["not_tested"] else ""),
          flush=True)
    for s in report["survivors"]:
        print(f"  SURVIVED ({s['status']}) {s['name']}\n    - {s['removed']}\n    + {s['added']}")
    for e in report["unused_equivalents"]:
        print(f"  (listed as equivalent, not seen: {e['function']}: {e['removed']} -> {e['added']})")
    if not keep and rerun is None:
        shutil.rmtree(work, ignore_errors=True)
    return report


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("modules", nargs="*", help=f"modules of upscale/core to mutate: {', '.join(MODULES)} "
                                                   "(default: all of them)")
    parser.add_argument("--children", type=int, default=2, help="mutants tested at once (default 2)")
    parser.add_argument("--keep", action="store_true", help="keep the temporary folders (mutmut show/browse there)")
    parser.add_argument("--sample", type=int, metavar="N",
                        help="with --rerun: of the mutants the kept run never reached, test a seeded random N only")
    parser.add_argument("--functions", metavar="F,G", type=lambda text: [f for f in text.split(",") if f],
                        help="mutate only these functions of the module ('func' or 'Class.method'); the "
                             "module's other mutants are reported as not tested")
    parser.add_argument("--rerun", type=Path, metavar="FOLDER",
                        help="a folder kept by an earlier run of one module: test its survivors again with "
                             "today's tests")
    args = parser.parse_args(argv)
    unknown = [m for m in args.modules if m not in MODULES]
    if unknown:
        parser.error(f"unknown module(s) {unknown}; choose from {', '.join(MODULES)}")
    modules = args.modules or list(MODULES)
    if (args.rerun is not None or args.functions) and len(modules) != 1:
        parser.error("--rerun and --functions take one module: name that module")
    if args.rerun is not None and args.functions:
        parser.error("--functions is for a fresh run, not with --rerun")
    reports = [run_module(m, MODULES[m], args.children, args.keep, args.rerun, args.sample, args.functions)
               for m in modules]
    print("\n| module | mutants | killed | equivalent | score over non-equivalent |\n|---|---|---|---|---|")
    for r in reports:
        print(f"| `core/{r['module']}.py` | {r['mutants']} | {r['killed']} | {r['equivalent']} | "
              f"{100 * r['score']:.1f} % |")
    return 0 if all(r["score"] >= 0.9 for r in reports) else 1


if __name__ == "__main__":
    sys.exit(main())
