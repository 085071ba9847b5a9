"""Render the demonstration patterns kept in this folder, with laueline itself.

    python examples/make_demo.py [--force]

The scenario (an invented silicon test structure) is defined once, in
``laueline.demo``; ``laueline demo`` renders the same patterns with the same
seeds, so these files and the demo's agree pixel for pixel.
"""

import argparse
from pathlib import Path

from laueline.demo import render_scenario


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--force", action="store_true", help="overwrite existing files")
    args = parser.parse_args()
    paths = render_scenario(Path(__file__).resolve().parent, force=args.force)
    for path in paths.values():
        print(f"wrote {path} and {path.with_suffix('').name}.truth.json")


if __name__ == "__main__":
    main()
