"""Render the demonstration patterns kept in this folder, with laueline itself.

    python examples/make_demo.py [--force]

The scenario (an invented silicon test structure) is defined once, in
``laueline.demo``; ``laueline demo`` renders the same patterns with the same
seeds, so these files and the demo's agree pixel for pixel.  The point
files ``reference.csv`` and ``channel.csv`` are crossings of the two
patterns as a person would digitise them (0.25 px pointing noise).
"""

import argparse
from pathlib import Path

from laueline.demo import render_scenario, write_scenario_points


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--force", action="store_true", help="overwrite existing files")
    args = parser.parse_args()
    folder = Path(__file__).resolve().parent
    paths = render_scenario(folder, force=args.force)
    points = write_scenario_points(folder, force=args.force)
    for name, path in paths.items():
        print(f"wrote {path}, {path.with_suffix('').name}.truth.json and {points[name].name}")


if __name__ == "__main__":
    main()
