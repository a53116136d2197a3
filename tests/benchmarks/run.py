"""Run the benchmarks and print one table.

    python -m tests.benchmarks.run [NAME ...]   (NAME matches bench_<NAME>.py)

Each ``bench_*.py`` module has ``main() -> list[dict]`` returning rows with keys
name, value, unit, target, ok. Targets are ratios or budgets measured in the same run.
"""

from __future__ import annotations

import importlib
import json
import pkgutil
import sys
import time
from pathlib import Path

import tests.benchmarks as pkg


def discover(names: list[str]) -> list[str]:
    found = sorted(m.name for m in pkgutil.iter_modules(pkg.__path__) if m.name.startswith("bench_"))
    if not names:
        return found
    wanted = [f"bench_{n.removeprefix('bench_')}" for n in names]
    missing = [w for w in wanted if w not in found]
    if missing:
        raise SystemExit(f"no such benchmark: {', '.join(missing)}; have: {', '.join(found)}")
    return wanted


def main(argv: list[str]) -> int:
    as_json = "--json" in argv
    names = [a for a in argv if not a.startswith("--")]
    rows: list[dict[str, object]] = []
    for mod_name in discover(names):
        module = importlib.import_module(f"tests.benchmarks.{mod_name}")
        t0 = time.perf_counter()
        print(f"running {mod_name} ...", file=sys.stderr, flush=True)
        for row in module.main():
            rows.append({"bench": mod_name.removeprefix("bench_"), **row})
        print(f"  {mod_name} took {time.perf_counter() - t0:.1f} s", file=sys.stderr, flush=True)
    if as_json:
        print(json.dumps(rows, indent=2, default=str))
    else:
        width = max((len(str(r["name"])) for r in rows), default=10)
        print(f"{'bench':<14} {'measure':<{width}}  {'value':>12} {'unit':<8} {'target':<18} ok")
        for r in rows:
            value = r["value"]
            shown = f"{value:.4g}" if isinstance(value, float) else str(value)
            ok = {True: "yes", False: "NO", None: "-"}.get(r.get("ok"), str(r.get("ok")))  # type: ignore[arg-type]
            print(f"{r['bench']:<14} {r['name']:<{width}}  {shown:>12} {r['unit']:<8} {str(r['target']):<18} {ok}")
    out = Path("test-artifacts")
    out.mkdir(exist_ok=True)
    (out / "benchmarks.json").write_text(json.dumps(rows, indent=2, default=str))
    return 0 if all(r.get("ok") is not False for r in rows) else 1


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
