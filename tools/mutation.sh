#!/usr/bin/env bash
# Mutation testing of the calibrated core and of the store's write path, with mutmut.
#
#   tools/mutation.sh              # both groups: features, then store
#   tools/mutation.sh features     # features/calibration.py, spectrogram.py, levels.py
#   tools/mutation.sh store        # classifier/store.py, the functions that write
#   tools/mutation.sh --report     # print the scores of the last run again, run nothing
#
# Prints killed / total per module; every surviving mutant, with its file:line and diff,
# goes to .mutation/survivors.txt. Developer tool: not part of CI, not a project
# dependency (it installs mutmut into .venv if missing). See DEVELOPERS.md.
#
# Workarounds, all confined to the work folder .mutation/:
# - Layout. features/ and classifier/ are the import packages callsieve.features and
#   callsieve.classifier, but mutmut names a module after its path (features/levels.py ->
#   features.levels) and would never see the tests' calls, which go to
#   callsieve.features.levels. So each group runs in a staging tree .mutation/<group>/
#   with src/callsieve/{features,classifier} (copies) and tests/: mutmut strips "src.",
#   names the module callsieve.features.levels and puts mutants/src on sys.path ahead of
#   the editable install.
# - Child processes. PYTHONPATH points at mutants/src too, so tests that run
#   `python -m callsieve.classifier.cli` (kill and resume, exit codes) run the mutant;
#   mutmut records which tests reach a function in its own process only, so a
#   sitecustomize.py hands the child processes' records back to it.
# - Fixtures. The store group reuses the session fixtures that do not touch the store
#   (the labelled site and the trained model, ~20 CPU-s) from a cache made on the first
#   run, instead of rebuilding them for every mutant.
# - mutmut's default fork runner crashes (KeyError in os.wait) when a test leaves a child
#   process behind (dask, loky); the fork server runner is used instead.
set -euo pipefail

ROOT="$(cd "$(dirname "${BASH_SOURCE[0]}")/.." && pwd)"
PY="$ROOT/.venv/bin/python"
MUTMUT="$ROOT/.venv/bin/mutmut"
MUTMUT_VERSION="3.8.1"
WORK="$ROOT/.mutation"
JOBS="${MUTATION_JOBS:-$(nproc)}"

# --- what each group mutates and which tests it runs ---------------------------------
# Test files are picked by glob, so new ones (test_calibration_per_frequency.py,
# test_descriptor_meaning.py, test_resume.py, ...) join without editing this script.
# For each mutant mutmut runs, fastest first and stopping at the first failure, only the
# selected tests that called the mutated function in a first, instrumented run.
# test_scoring.py serves the store group only: it scores a deployment with a trained
# model, which the features mutants would pay for over and over.
FEATURES_MUTATE=(features/calibration.py features/spectrogram.py features/levels.py)
FEATURES_TESTS=("test_calibration*.py" "test_spectrogram*.py" "test_levels*.py" "test_descriptor*.py"
                "test_deployment*.py" "test_*calibration*.py" "test_*descriptor*.py"
                "test_*spectrogram*.py" "test_*levels*.py")
FEATURES_NAMES=()                      # every function
FEATURES_CACHED_FIXTURES=""            # labelled depends on calibration: never cached here
FEATURES_SQL_CASE=0

STORE_MUTATE=(classifier/store.py)
STORE_TESTS=("test_scoring*.py" "test_*store*.py" "test_*resume*.py")
# Every function that writes; latest_run_id (a read) is left out.
STORE_NAMES=("callsieve.classifier.store.x_open_store__mutmut_*"
             "callsieve.classifier.store.xǁTransactionǁ*"
             "callsieve.classifier.store.x_upsert_deployment__mutmut_*"
             "callsieve.classifier.store.x_upsert_file__mutmut_*"
             "callsieve.classifier.store.x_replace_file_result__mutmut_*"
             "callsieve.classifier.store.x_now_utc__mutmut_*")
STORE_CACHED_FIXTURES="labelled sweep_model"   # tests/conftest.py; neither calls the store
# mutmut also upper- or lower-cases string literals; on SQL text (outside quoted values)
# that changes nothing, as SQLite reads keywords and names in any case. Those mutants are
# listed in .mutation/store.equivalent and not run (each would cost a full scoring run).
STORE_SQL_CASE=1

# --- the tester, in the project's venv -------------------------------------------------
if [[ ! -x "$PY" ]]; then
    echo "mutation.sh: no $ROOT/.venv; make it first: python3 -m venv .venv && .venv/bin/pip install -e '.[test]'" >&2
    exit 2
fi
if [[ "$("$PY" -c 'import importlib.metadata as m; print(m.version("mutmut"))' 2>/dev/null)" != "$MUTMUT_VERSION" ]]; then
    echo "installing mutmut==$MUTMUT_VERSION into $ROOT/.venv (not a project dependency)"
    "$PY" -m pip install -q "mutmut==$MUTMUT_VERSION"
fi

REPORT_ONLY=0
groups=()
for a in "$@"; do
    case "$a" in
        --report) REPORT_ONLY=1 ;;
        features | store) groups+=("$a") ;;
        *) echo "mutation.sh: unknown argument '$a' (features, store, --report)" >&2; exit 2 ;;
    esac
done
[[ ${#groups[@]} -eq 0 ]] && groups=(features store)

mkdir -p "$WORK"
SURVIVORS="$WORK/survivors.txt"
SCORES="$WORK/scores.txt"
: >"$SURVIVORS"
: >"$SCORES"
export OMP_NUM_THREADS=1 MKL_NUM_THREADS=1 OPENBLAS_NUM_THREADS=1   # JOBS mutants side by side
export MPLBACKEND=Agg

toml_list() {  # toml_list a b c -> ["a", "b", "c"]
    local out="" x
    for x in "$@"; do out+="${out:+, }\"$x\""; done
    printf '[%s]' "$out"
}

cat >"$WORK/helper.py" <<'EOF'
"""Written by tools/mutation.sh into .mutation/: which mutants to run, and the report.

    helper.py todo GROUP RESULTS SQL_CASE NAME_GLOB...   names to run, one a line
    helper.py report GROUP RESULTS SCORES SURVIVORS SECONDS NAME_GLOB...

Run in .mutation/GROUP (mutmut reads its mutants from there)."""

import ast
import fnmatch
import re
import sys
from collections import Counter, defaultdict
from pathlib import Path

from mutmut.mutation.diff_apply import get_diff_for_mutant

SQL = re.compile(r"\b(SELECT|INSERT|UPDATE|DELETE|PRAGMA|VALUES|BEGIN|COMMIT|ROLLBACK|CONFLICT|EXCLUDED)\b", re.I)


def statuses(results, globs):
    out = {}
    for line in open(results):
        key, _, st = line.strip().rpartition(": ")
        if key and (not globs or any(fnmatch.fnmatch(key, g) for g in globs)):
            out[key] = st
    return out


def split(key):  # callsieve.features.levels.x_f__mutmut_3 -> features/levels.py, x_f
    mod, func = re.split(r"\.(?=x_|xǁ)", key, maxsplit=1)
    return "/".join(mod.split(".")[1:]) + ".py", func.partition("__mutmut_")[0]


def diff(key):
    return get_diff_for_mutant(key, path="src/callsieve/" + split(key)[0])


def sql_case_only(d):
    """True when a mutant only changes the case of SQL text outside its quoted values:
    SQLite reads keywords and names in any case, so no test can tell (equivalent)."""
    old = [x[1:] for x in d.split("\n")[2:] if x.startswith("-")]
    new = [x[1:] for x in d.split("\n")[2:] if x.startswith("+")]
    return (
        len(old) == len(new) == 1
        and old != new
        and old[0].lower() == new[0].lower()
        and SQL.search(old[0]) is not None
        and "%" not in old[0]
        and re.findall(r"'[^']*'", old[0]) == re.findall(r"'[^']*'", new[0])
    )


def first_lines(path):  # (class or None, function) -> its first line (decorator or def)
    out = {}

    def visit(node, cls):
        for n in ast.iter_child_nodes(node):
            if isinstance(n, ast.ClassDef):
                visit(n, n.name)
            elif isinstance(n, (ast.FunctionDef, ast.AsyncFunctionDef)):
                out[(cls, n.name)] = min([n.lineno] + [d.lineno for d in n.decorator_list])

    visit(ast.parse(Path(path).read_text()), None)
    return out


def todo(group, results, sql_case, *globs):
    status = statuses(results, globs)
    equivalent = {k for k in status if sql_case == "1" and sql_case_only(diff(k))}
    Path(f"../{group}.equivalent").write_text("".join(k + "\n" for k in sorted(equivalent)))
    print("\n".join(sorted(set(status) - equivalent)))


def report(group, results, scores, survivors, seconds, *globs):
    status = statuses(results, globs)
    eq_file = Path(f"../{group}.equivalent")
    equivalent = set(eq_file.read_text().split()) if eq_file.is_file() else set()
    by_module = defaultdict(Counter)
    for key, st in status.items():
        by_module[split(key)[0]]["equivalent" if key in equivalent else st] += 1
    with open(scores, "a") as fh:
        for mod in sorted(by_module):
            c = by_module[mod]
            total = sum(v for k, v in c.items() if k != "equivalent")
            killed = c["killed"] + c["timeout"]
            rest = ", ".join(f"{k} {v}" for k, v in sorted(c.items()) if k not in ("killed", "timeout", "equivalent"))
            line = f"{mod:28s} {killed:4d} / {total:<4d} killed ({100 * killed / max(total, 1):5.1f} %)   {rest}"
            if c["equivalent"]:
                line += f"; not counted: {c['equivalent']} equivalent (case of SQL text), not run"
            fh.write(line + "\n")
        fh.write(f"   ({group}: {seconds} s wall)\n")

    starts, entries = {}, []
    for key, st in status.items():
        if st in ("killed", "timeout") or key in equivalent:
            continue
        module, func = split(key)
        path = "src/callsieve/" + module
        starts.setdefault(path, first_lines(path))
        cls, name = (func.split("ǁ")[1], func.split("ǁ")[2]) if func.startswith("xǁ") else (None, func[2:])
        d = diff(key)
        line = 0
        hunk = re.search(r"^@@ -(\d+)", d, re.M)
        if hunk and (cls, name) in starts[path]:
            n = int(hunk.group(1))  # line of the function's text where the hunk starts
            for x in d[hunk.end() :].split("\n")[1:]:
                if x.startswith("-"):
                    break
                if not x.startswith("+"):
                    n += 1
            line = starts[path][(cls, name)] + n - 1
        body = "\n".join(d.split("\n")[2:])
        entries.append((module, line, f"## {module}:{line or '?'}  {key}  [{st}]\n{body}\n\n"))
    with open(survivors, "a") as fh:
        fh.writelines(e[2] for e in sorted(entries))


if __name__ == "__main__":
    {"todo": todo, "report": report}[sys.argv[1]](*sys.argv[2:])
EOF

write_helpers() {  # the pytest plugin and sitecustomize.py of the workarounds above
    local dir="$1"
    mkdir -p "$dir/plugins"
    cat >"$dir/plugins/mutation_plugin.py" <<'EOF'
"""pytest plugin written by tools/mutation.sh; lives only in .mutation/."""
import os
import pickle
import shutil
from pathlib import Path

import pytest

_CACHE = Path(os.environ["MUTATION_FIXTURE_CACHE"])
_CACHED = set(os.environ.get("MUTATION_CACHED_FIXTURES", "").split())
_HITS = Path(os.environ["MUTATION_CHILD_HITS"])


def _paths(value):
    if isinstance(value, Path):
        yield value
    elif isinstance(value, (tuple, list)):
        for v in value:
            yield from _paths(v)


def _remap(value, old, new):
    if isinstance(value, Path):
        return new / value.relative_to(old)
    if isinstance(value, (tuple, list)):
        items = [_remap(v, old, new) for v in value]
        return type(value)(*items) if hasattr(value, "_fields") else type(value)(items)
    return value


@pytest.hookimpl(tryfirst=True)
def pytest_fixture_setup(fixturedef, request):
    """A cached fixture's value, with its files in the cache, when there is one."""
    saved = _CACHE / fixturedef.argname / "value.pickle"
    if fixturedef.argname not in _CACHED or not saved.is_file():
        return None
    root, value = pickle.loads(saved.read_bytes())
    result = _remap(value, Path(root), _CACHE / fixturedef.argname / "files") if root else value
    fixturedef.cached_result = (result, fixturedef.cache_key(request), None)
    return result


@pytest.hookimpl(wrapper=True, specname="pytest_fixture_setup")
def pytest_fixture_setup_save(fixturedef, request):  # pytest reads pytest_* names only
    """Copy a cached fixture's first value, and the folder its paths are in, to the cache."""
    result = yield
    target = _CACHE / fixturedef.argname
    if fixturedef.argname in _CACHED and not target.exists():
        paths = list(_paths(result))
        root = Path(os.path.commonpath([p.parent for p in paths])) if paths else None
        tmp = _CACHE / f".{fixturedef.argname}.{os.getpid()}"
        shutil.rmtree(tmp, ignore_errors=True)
        tmp.mkdir(parents=True)
        if root is not None:
            shutil.copytree(root, tmp / "files")
        (tmp / "value.pickle").write_bytes(pickle.dumps((str(root) if root else None, result)))
        try:
            tmp.rename(target)
        except OSError:
            shutil.rmtree(tmp, ignore_errors=True)
    return result


@pytest.hookimpl(tryfirst=True)
def pytest_runtest_teardown(item, nextitem):
    """Hand mutmut the functions that this test's child processes reached."""
    if os.environ.get("MUTANT_UNDER_TEST") != "stats":
        return
    from mutmut.state import state

    for f in _HITS.glob("*.hits"):
        state()._stats.update(f.read_text().split())
        f.unlink()
EOF
    cat >"$dir/plugins/sitecustomize.py" <<'EOF'
"""Written by tools/mutation.sh: a child process of a test, during mutmut's instrumented
run, leaves the names of the mutated functions it reached for the parent's plugin."""
import atexit
import os


def _dump():
    import sys

    st = sys.modules.get("mutmut.state")
    names = st.state()._stats if st is not None else ()
    if names:
        path = os.path.join(os.environ["MUTATION_CHILD_HITS"], f"{os.getpid()}.hits")
        with open(path + ".tmp", "w") as fh:
            fh.write("\n".join(sorted(names)))
        os.replace(path + ".tmp", path)


if os.environ.get("MUTANT_UNDER_TEST") == "stats" and os.environ.get("MUTATION_CHILD_HITS"):
    atexit.register(_dump)
EOF
}

run_group() {
    local group="$1"
    local -n mutate="${group^^}_MUTATE" patterns="${group^^}_TESTS" names="${group^^}_NAMES"
    local cached="${group^^}_CACHED_FIXTURES" sql_case="${group^^}_SQL_CASE"
    local dir="$WORK/$group"
    local t0=$SECONDS
    if [[ $REPORT_ONLY == 1 ]]; then
        [[ -d "$dir/mutants" ]] || { echo "mutation.sh: no earlier run of $group in $dir" >&2; return 1; }
        report "$group"
        return
    fi

    # Test files of this group, by glob, once each.
    local tests=() f p
    shopt -s nullglob
    for p in "${patterns[@]}"; do
        for f in "$ROOT"/tests/$p; do
            f="tests/${f##*/}"
            [[ " ${tests[*]} " == *" $f "* ]] || tests+=("$f")
        done
    done
    shopt -u nullglob
    if [[ ${#tests[@]} -eq 0 ]]; then
        echo "mutation.sh: no test file matches the $group group" >&2
        return 1
    fi

    # Staging tree: src/callsieve/<package>, tests/, a pyproject with the project's pytest
    # settings and the mutmut table. Always fresh: no result of an earlier run is reused.
    rm -rf "$dir" "$WORK/$group.equivalent"
    mkdir -p "$dir/src/callsieve" "$dir/mutants/src" "$dir/fixture-cache" "$dir/child-hits"
    cp -r "$ROOT/features" "$dir/src/callsieve/features"
    cp -r "$ROOT/classifier" "$dir/src/callsieve/classifier"
    cp -r "$ROOT/tests" "$dir/tests"
    find "$dir" -name __pycache__ -prune -exec rm -rf {} +
    write_helpers "$dir"
    local only=() m
    for m in "${mutate[@]}"; do only+=("src/callsieve/$m"); done
    "$PY" - "$ROOT/pyproject.toml" >"$dir/pyproject.toml" <<'EOF'
import json, sys, tomllib
ini = tomllib.load(open(sys.argv[1], "rb")).get("tool", {}).get("pytest", {}).get("ini_options", {})
print("[tool.pytest.ini_options]")
for k, v in ini.items():
    print(f"{k} = {json.dumps(v)}")
EOF
    cat >>"$dir/pyproject.toml" <<EOF

[tool.mutmut]
source_paths = ["src/callsieve"]
only_mutate = $(toml_list "${only[@]}")
pytest_add_cli_args_test_selection = $(toml_list "${tests[@]}")
pytest_add_cli_args = ["-p", "no:cacheprovider", "-p", "mutation_plugin"]
process_isolation = "forkserver"
use_git_change_detection = false
EOF

    echo "== $group: mutating ${mutate[*]}"
    echo "   tests: ${tests[*]}"
    (
        cd "$dir"
        export PYTHONPATH="$dir/mutants/src:$dir/plugins${PYTHONPATH:+:$PYTHONPATH}"
        export MUTATION_FIXTURE_CACHE="$dir/fixture-cache" MUTATION_CACHED_FIXTURES="${!cached}"
        export MUTATION_CHILD_HITS="$dir/child-hits"
        run_mutmut() {
            # In a session of its own, so that the processes tests leave behind (loky and
            # dask workers, resource trackers) go with it at the end or on Ctrl-C.
            setsid "$MUTMUT" run --max-children "$JOBS" "$@" >>"$WORK/$group.log" 2>&1 &
            local pid=$! rc=0
            trap 'kill -- -$pid 2>/dev/null; exit 130' INT TERM
            wait $pid || rc=$?
            kill -- -$pid 2>/dev/null || true
            return $rc
        }
        fail() {
            echo "mutation.sh: mutmut failed for $group; see $WORK/$group.log" >&2
            tr '\r' '\n' <"$WORK/$group.log" | tail -20 >&2
            exit 1
        }
        : >"$WORK/$group.log"
        if [[ ${!sql_case} == 1 ]]; then
            # First pass: make the mutants and the test map only (mutmut stops, as asked
            # for a mutant that does not exist); then run all but the equivalent ones.
            if run_mutmut "no-such-mutant" || ! grep -q "nothing matches" "$WORK/$group.log"; then
                fail
            fi
            "$MUTMUT" results --all true >"$WORK/$group.results"
            local todo=()
            mapfile -t todo < <("$PY" "$WORK/helper.py" todo "$group" "$WORK/$group.results" 1 "${names[@]}")
            run_mutmut "${todo[@]}" || fail
        else
            run_mutmut "${names[@]}" || fail
        fi
    )
    echo $((SECONDS - t0)) >"$WORK/$group.seconds"
    report "$group"
}

report() {  # scores per module and the survivors of one group's last run
    local group="$1"
    local -n names="${group^^}_NAMES"
    (
        cd "$WORK/$group"
        "$MUTMUT" results --all true >"$WORK/$group.results"
        "$PY" "$WORK/helper.py" report "$group" "$WORK/$group.results" "$SCORES" "$SURVIVORS" \
            "$(cat "$WORK/$group.seconds")" "${names[@]}"
    )
}

start=$SECONDS
for g in "${groups[@]}"; do
    run_group "$g"
done
echo
echo "mutation score (killed includes timeouts; 'no tests': no selected test calls the function)"
cat "$SCORES"
[[ $REPORT_ONLY == 1 ]] || echo "total time: $((SECONDS - start)) s"
echo "surviving mutants, file:line and diff: ${SURVIVORS#"$ROOT"/}"
