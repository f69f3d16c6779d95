"""Regenerate the Lorran Valley demo files (invented data).

Writes reference.csv, cohort.csv, spec.toml and rules.toml. The spec and the rules are the
copies packaged with casemix (src/casemix/data/), so this script is also how the spec.toml and
rules.toml next to it are kept identical to those; the tests check that they are.

    python examples/lorran_valley/regenerate.py               # into this folder
    python examples/lorran_valley/regenerate.py --out my_dir --seed 2026
"""

from __future__ import annotations

import argparse
from pathlib import Path

from casemix.demo import write_demo


def main(argv: list[str] | None = None) -> None:
    """Parse the command line and write the four demo files."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument(
        "--out", type=Path, default=Path(__file__).resolve().parent,
        help="folder to write into (default: the folder of this script)",
    )
    parser.add_argument("--seed", type=int, default=2026, help="random seed (default 2026)")
    args = parser.parse_args(argv)
    for role, path in write_demo(args.out, seed=args.seed).items():
        print(f"{role:<10} {path}")


if __name__ == "__main__":
    main()
