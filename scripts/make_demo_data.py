"""Regenerate demo_data/ (the invented session behind `calcium demo`) with the forward model, fixed seed.

Usage: python scripts/make_demo_data.py [--out demo_data]
"""
import argparse
from pathlib import Path

from calcium.demo import DEMO_SCENARIO, make_demo_data


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", default=str(Path(__file__).resolve().parent.parent / "demo_data"))
    parser.add_argument("--seed", type=int, default=DEMO_SCENARIO["seed"])
    args = parser.parse_args()
    folder = make_demo_data(args.out, seed=args.seed)
    for path in sorted(folder.iterdir()):
        print(f"{path}  {path.stat().st_size:,} bytes")


if __name__ == "__main__":
    main()
