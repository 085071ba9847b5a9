"""Start-up cost of a command against the import floor of its dependencies.

    python tests/benchmarks/bench_startup.py [--repeat 11]

Whole processes, interleaved so that both see the same machine load:

1. ``python -m laueline predict Si --zone 2 3 0 --json OUT --force``
   (reads the bundled CIF, predicts 40-odd lines, writes the JSON);
2. the floor: ``python -c "import numpy, gemmi, spglib"``, the libraries
   ``predict`` cannot do without, in a fresh interpreter.

Byte code is cached between runs (in a private folder) as it is after
``pip install``.  Prints the medians and their ratio (the target is at most
1.5), then the modules the command imports beyond the floor's, so a
regression can be traced to the import that caused it.
"""

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SRC = Path(__file__).resolve().parents[2] / "src"
FLOOR = "import numpy, gemmi, spglib"


def _run(argv, env):
    t0 = time.perf_counter()
    subprocess.run(argv, check=True, stdout=subprocess.DEVNULL, env=env)
    return time.perf_counter() - t0


def _modules(code, env):
    out = subprocess.run([sys.executable, "-c", code + "; import sys; print(*sys.modules)"],
                         check=True, capture_output=True, text=True, env=env).stdout
    return set(out.split())


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=11)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        # Byte code cached as after 'pip install' (which compiles it), in a
        # private folder so the checkout stays clean.
        env = dict(os.environ, PYTHONPATH=f"{SRC}{os.pathsep}{os.environ.get('PYTHONPATH', '')}",
                   PYTHONPYCACHEPREFIX=str(Path(tmp) / "pycache"))
        env.pop("PYTHONDONTWRITEBYTECODE", None)
        out = Path(tmp) / "pattern.json"
        command = [sys.executable, "-m", "laueline", "predict", "Si", "--zone", "2", "3", "0",
                   "--json", str(out), "--force"]
        floor = [sys.executable, "-c", FLOOR]
        _run(command, env)  # warm the file cache and compile byte code once
        _run(floor, env)
        t_cmd, t_floor = [], []
        for _ in range(args.repeat):
            t_cmd.append(_run(command, env))
            t_floor.append(_run(floor, env))
        extra = sorted(m for m in _modules("import sys; sys.argv = ['laueline']; "
                                           "import laueline.cli, laueline.lines, "
                                           "laueline.report", env) - _modules(FLOOR, env)
                       if not m.startswith("laueline") and "." not in m)
    m_cmd, m_floor = statistics.median(t_cmd), statistics.median(t_floor)
    print(f"laueline predict ... --json   median {m_cmd * 1e3:7.1f} ms  ({args.repeat} runs)")
    print(f"import numpy, gemmi, spglib   median {m_floor * 1e3:7.1f} ms  (the floor)")
    print(f"ratio                         {m_cmd / m_floor:7.2f}   (target <= 1.5)")
    print("top-level modules beyond the floor:", ", ".join(extra) or "none")


if __name__ == "__main__":
    main()
